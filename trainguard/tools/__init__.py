"""The tools layer: workflows that run pytest in subprocesses (calibrate, bisect, demo).

Tools import the core, never the skins; every `python -m pytest` command line they run
or suggest is built, and every pytest output they read is parsed, in `pytest_runs`.
"""
