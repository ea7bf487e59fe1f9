"""The pre-analysis-plan appendix: compute once (``collect``), tabulate (``tables``), render (``render``), write atomically (``files``).

Examples
--------
>>> from pathlib import Path
>>> import tempfile
>>> from designcalc import load_scenario
>>> from designcalc.report import ReportSettings, build_report, write_report
>>> s = load_scenario(Path(__file__).parents[2] / "scenarios" / "lake_orrin_savings.toml")
>>> r = build_report(s, ReportSettings(units=(200,), treatment_probabilities=(0.5,), graphs=4,
...                  assignments_per_graph=4, precision=0.5, max_units=800))
>>> out = write_report(r, Path(tempfile.mkdtemp()) / "appendix")
>>> sorted(p.name for p in out.iterdir())
['figures', 'provenance.json', 'report.html', 'report.json', 'report.md', 'scenario', 'tables']
"""

from designcalc.report.collect import Report, ReportSettings, build_report
from designcalc.report.files import write_report
from designcalc.report.tables import Table, report_tables

__all__ = ["Report", "ReportSettings", "Table", "build_report", "report_tables", "write_report"]
