"""The human report of a run (placeholder until the report lands)."""


def write_report(folder, metrics) -> None:
    (folder / "report.html").write_text("<html><body>report</body></html>", encoding="utf-8")
