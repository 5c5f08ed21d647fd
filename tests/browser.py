"""Open an HTML file in headless Chromium (the Debian package) and read what the browser laid out.

:func:`layout` loads a copy of the page with a small script added at its end; the script waits for
the page's load event, measures the summary tables, the document and every image at the window's
width, and writes the figures as JSON into the page, which Chromium's ``--dump-dom`` prints.
:func:`screenshot` saves a PNG of the page as a person would see it at that width. The page the
report writes has no script of its own; the added one changes nothing the layout depends on (it
writes into a hidden element).
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import tempfile
from pathlib import Path

# .ci/run sets this: there a missing browser is a failure, elsewhere the browser tests are skipped.
REQUIRE_ENVIRONMENT = "REHEDGE_REQUIRE_BROWSER"

_MEASURE = """
<pre id="layout-check" style="display:none"></pre>
<script>
window.addEventListener("load", function () {
  var tables = Array.prototype.map.call(document.querySelectorAll("table.summary"), function (t) {
    var box = t.getBoundingClientRect();
    return {left: box.left, right: box.right, width: box.width};
  });
  var images = Array.prototype.map.call(document.images, function (img) {
    return {alt: img.alt, complete: img.complete, natural_width: img.naturalWidth,
            shown_width: img.getBoundingClientRect().width};
  });
  document.getElementById("layout-check").textContent = JSON.stringify({
    window_width: window.innerWidth, document_width: document.documentElement.scrollWidth,
    document_height: document.documentElement.scrollHeight, tables: tables, images: images});
});
</script>
"""


def chromium() -> str | None:
    """The Chromium executable, or None when the machine has none."""
    return shutil.which("chromium") or shutil.which("chromium-browser")


def _run(arguments: list[str]) -> str:
    command = [chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
               "--disable-dev-shm-usage", "--virtual-time-budget=10000", *arguments]
    done = subprocess.run(command, capture_output=True, text=True, timeout=120,
                          env={**os.environ, "HOME": tempfile.gettempdir()})
    if done.returncode != 0:
        raise RuntimeError(f"chromium exited with {done.returncode}: {done.stderr.strip()[-500:]}")
    return done.stdout


def layout(page: Path, width: int, height: int = 900) -> dict:
    """What Chromium laid out for ``page`` in a window ``width`` x ``height`` px: the window and
    document widths, each summary table's box, each image's load state."""
    text = Path(page).read_text(encoding="utf-8")
    with tempfile.TemporaryDirectory(prefix="rehedge-browser-") as folder:
        measured = Path(folder) / "page.html"
        measured.write_text(text.replace("</body>", _MEASURE + "</body>"), encoding="utf-8")
        dom = _run([f"--window-size={width},{height}", "--dump-dom", measured.as_uri()])
    found = re.search(r'<pre id="layout-check"[^>]*>(.*?)</pre>', dom, flags=re.S)
    if found is None or not found.group(1).strip():
        raise RuntimeError("the page's load event never came (no layout figures in the dumped page)")
    return json.loads(found.group(1).replace("&quot;", '"').replace("&amp;", "&"))


def screenshot(page: Path, width: int, height: int, target: Path) -> Path:
    """A PNG of ``page`` in a window ``width`` x ``height`` px (a height of the whole page shows it all)."""
    target = Path(target)
    target.parent.mkdir(parents=True, exist_ok=True)
    _run([f"--window-size={width},{height}", f"--screenshot={target}", Path(page).resolve().as_uri()])
    return target
