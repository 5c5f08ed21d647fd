"""Hedge tables: :mod:`~rehedge.tables.reader` (numpy only) and :mod:`~rehedge.tables.export`."""
