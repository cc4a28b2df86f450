"""Reports: posterior to tables, figures and a self-contained HTML report for a finance team."""

from liftpool.reports.html import CAUTIONS
from liftpool.reports.spend import check_spend, read_spend
from liftpool.reports.tables import ReportTables, build_tables, interval
from liftpool.reports.write import write_report, write_xlsx

__all__ = ["CAUTIONS", "ReportTables", "build_tables", "check_spend", "interval", "read_spend", "write_report",
           "write_xlsx"]
