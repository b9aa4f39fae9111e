"""The `shardsieve` command line (click). Each subcommand lives in its own module."""
