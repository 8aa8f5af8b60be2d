"""The names of what swarmaudit itself writes (the tables of export and compare, the report, the figure folder).

One list for the export that writes them and for run discovery, which must never take a
folder of them for a snapshot.
"""

TABLE_NAMES = ("census.csv", "migration.csv", "migration_summary.csv", "drift.csv")
#: what ``swarmaudit compare --out`` writes
COMPARE_TABLE_NAMES = ("compare_particles.csv", "compare_distributions.csv", "compare_census.csv",
                       "compare_totals.csv", "compare_worst.csv")
REPORT_NAME = "report.html"
FIGURE_DIR = "figures"


def only_our_output(names) -> bool:
    """Whether the file names of a folder are all swarmaudit's own tables and report (and some are)."""
    names = [n for n in names if not n.startswith(".")]
    ours = set(TABLE_NAMES) | set(COMPARE_TABLE_NAMES) | {REPORT_NAME}
    return bool(names) and all(n in ours for n in names)
