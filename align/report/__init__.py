"""The run report: one self-contained HTML page a person opens, and its plots as PNG files.

    details.py     what evaluation adds for the report (intervals, confusion matrices, retrieval
                   examples), kept as evaluation.json in the run folder
    plots.py       the plots (matplotlib, Agg backend) as PNG bytes
    thumbnails.py  evaluation images as small inline pictures, read from the shards by key
    page.py        HTML pieces: styles, tables, gallery rows, the document
    build.py       ``write_report``: the run folder's records -> report.html + plots/*.png
"""
from .build import write_report
from .details import read_details, write_details

__all__ = ["read_details", "write_details", "write_report"]
