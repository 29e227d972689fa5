"""lodemap's site workflow, built on ``fingerprint``: floor plans, graph
building, survey reconstruction, map fitting, map quality, evaluation,
sweeps, reports and the ``lodemap`` command line."""
