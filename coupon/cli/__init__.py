"""The command line: a thin layer that reads files, prints and sets exit codes."""
