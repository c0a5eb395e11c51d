"""The library's web page (`benchkit serve`): rank parts at a bias and temperature, a part's
curves, bands, claims and verification reports, several parts overlaid, and downloads.

Starlette serves it (web/app.py), Jinja2 renders it (web/templating.py: one environment, shared
with the HTML verification report), Matplotlib draws the plots on the server (web/plots.py).
"""

from benchkit.web.app import create_app

__all__ = ["create_app"]
