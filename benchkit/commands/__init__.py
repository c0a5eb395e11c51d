"""One module per sub-command; each exposes register(subparsers) and sets `func` on its parser.

The CLI imports the modules listed in COMMANDS, in this order (the order of `benchkit --help`).
Heavy imports (numpy, scipy, lmfit, pyvisa) belong inside `run`, so the CLI starts quickly.
"""

COMMANDS = ("sim", "measure", "fit", "library", "export", "verify", "classcheck", "budget", "lot", "serve")
