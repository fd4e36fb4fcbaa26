"""`python -m ganlet`: the same as the `ganlet` command."""

from ganlet.command import main

main()
