"""Allow ``python -m designcalc``."""

from designcalc.cli.main import run

run()
