"""`python -m nightbench` is `nightbench` (handy where the console script is not on PATH)."""

from nightbench.cli import main

main(prog_name="nightbench")
