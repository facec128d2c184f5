"""`python -m gridplan` runs the command line."""

from gridplan.cli import app

app(prog_name="gridplan")
