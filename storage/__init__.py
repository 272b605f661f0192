"""Sources that yield record batches and the history store.

This package never imports the statistics: it moves Arrow record batches in
and plain records out.  Errors come from ``monitor.errors`` (a module with no
imports of its own).
"""
