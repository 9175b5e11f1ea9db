"""`python -m tillite.cli`: the same as the `tillite` command."""

from . import main

main()
