"""The core layer: everything trainguard knows about recording, storing and comparing runs.

Nothing here imports pytest or argparse, prints, or builds a command line: the pytest
plugin and the CLI (`trainguard.skins`) and the subprocess tools (`trainguard.tools`) sit
above and hand in what only they know (fix commands, options). Data flows one way:
capture -> records -> store -> comparison -> report (data) -> renderers.
"""
