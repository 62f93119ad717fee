"""The command line: cli.py parses and dispatches, one cmd_*.py per verb."""
