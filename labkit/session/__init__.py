"""The session layer: running a lab session step by step, entering readings, and the verdict rule.

:class:`~labkit.session.runner.SessionRunner` walks a template on a bench and records every
state change, step move and reading in an :class:`~labkit.logbook.storage.Archive`;
:mod:`labkit.session.readings` parses and converts readings; :mod:`labkit.session.verdict`
holds the verdict rule (``docs/verdicts.md``).
"""
