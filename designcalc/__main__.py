"""Allow ``python -m designcalc``."""

from designcalc.cli.main import run

# Guarded: process pools started with spawn (dask's LocalCluster) re-import the main module.
if __name__ == "__main__":
    run()
