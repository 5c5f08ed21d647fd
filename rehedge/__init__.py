"""The desk's application: config, building the problem and policies from it, training, run
folders, the held-out comparison, sweeps, the report, hedge tables and the command line.

Imports ``hedge_env`` (the problem) and ``agents`` (who decides); nothing imports it. Kept free of
imports so that ``rehedge advise`` starts with numpy alone.
"""
