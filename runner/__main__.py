"""`python -m runner` is `nightbench` (handy where the console script is not on PATH)."""

from runner.cli import main

main(prog_name="nightbench")
