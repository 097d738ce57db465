"""tree2sql: compile trained tree ensembles into exact SQL, verify it, deploy it in place."""

__version__ = "0.1.0"
