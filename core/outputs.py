"""The names of what swarmaudit itself writes (the export's tables, report and figure folder).

One list for the export that writes them and for run discovery, which must never take a
folder of them for a snapshot.
"""

TABLE_NAMES = ("census.csv", "migration.csv", "migration_summary.csv", "drift.csv")
REPORT_NAME = "report.html"
FIGURE_DIR = "figures"


def only_our_output(names) -> bool:
    """Whether the file names of a folder are all swarmaudit's own tables and report (and some are)."""
    names = [n for n in names if not n.startswith(".")]
    ours = set(TABLE_NAMES) | {REPORT_NAME}
    return bool(names) and all(n in ours for n in names)
