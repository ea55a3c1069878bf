"""The run report: one self-contained HTML page a person opens, and its plots as PNG files.

    details.py     what evaluation adds for the report (intervals, confusion matrices, retrieval
                   examples), kept as evaluation.json in the run folder
    plots.py       the plots (matplotlib, Agg backend) as PNG bytes
    thumbnails.py  evaluation images as small inline pictures, read from the shards by key
    page.py        HTML pieces: styles, tables, gallery rows, the document
    build.py       ``write_report``: the run folder's records -> report.html + plots/*.png
"""
__all__ = ["read_details", "write_details", "write_report"]


def __getattr__(name: str):
    # loaded on first use: build.py pulls in matplotlib and torch (seconds), which the service's
    # status page, importing only search_view.py and thumbnails.py, never needs
    if name == "write_report":
        from .build import write_report
        return write_report
    if name in ("read_details", "write_details"):
        from . import details
        return getattr(details, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
