"""`python -m tree2sql`: the same command line as the `tree2sql` script, for environments
where the script's directory is not on PATH."""

from tree2sql.cli import main

main()
