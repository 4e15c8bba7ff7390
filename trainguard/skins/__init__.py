"""The skins layer: thin front ends over the core and the tools.

`plugin` is the pytest plugin (options, marker, fixture, hooks); `cli` is the
`trainguard` command (argparse, printing, exit codes). Neither holds logic the other needs.
"""
