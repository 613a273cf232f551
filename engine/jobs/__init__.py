"""Jobs and the command line: one source/target pair end to end, files in and files out.

pair      ``Pair`` and ``Settings``: the one way in for the add-on, the command line and batch jobs
cli       ``python -m engine``: argument parsing and exit codes
commands  the sub-commands (basis, approximate, transfer, detail, demo)
demo      the generated demo creature and its painted signals
"""
