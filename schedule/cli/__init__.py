"""The command line, one module per verb; main.py assembles the group."""
