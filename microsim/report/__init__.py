"""The report: figures (matplotlib), the model's structure (networkx) and one HTML page
(Jinja2) made from a finished run folder's tables, never from the engines.

Imported only by `microsim report` and `microsim run --report`, so other commands never
load matplotlib, Jinja2 or networkx.
"""
