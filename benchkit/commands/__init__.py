"""One module per sub-command; each exposes register(subparsers) and sets `func` on its parser.

The CLI imports the modules listed in COMMANDS; a module whose file does not exist yet is
skipped, so sub-commands can land one at a time.
"""

COMMANDS = ("sim", "measure", "fit", "library", "export", "verify", "budget", "lot")
