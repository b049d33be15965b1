"""Views over recorded results: the verification matrix, regressions, traceability."""
