"""toposcout's data files: connectivity families, gate sets and device profiles (TOML).

A package only so that the files install with toposcout; ``toposcout.compiler.targets.TOPOLOGY_DIR``
and ``toposcout.compiler.profiles`` read them from here.
"""
