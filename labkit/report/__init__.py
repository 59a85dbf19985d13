"""Reports rendered from the session and logbook layer, with no kernel and no widgets.

- :mod:`labkit.report.session`: one session's report (HTML, optional PDF through Chromium)
- :mod:`labkit.report.prelab`: the pre-lab sheet of a bench and template
- :mod:`labkit.report.review`: review across sessions (pass rates, errors, outliers, carts over time)
- :mod:`labkit.report.html` / :mod:`labkit.report.svg`: escaping, sanitized Markdown, inline SVG
- :mod:`labkit.report.tables`: tables as CSV, Parquet or Excel (formula-injection guard)
"""

from __future__ import annotations
