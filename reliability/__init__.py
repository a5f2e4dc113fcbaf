"""Reliability and security campaign: each promise of docs/design.md §7 turned into a bounded experiment.

``python -m reliability.run`` (``make reliability``) starts real ``burstlens serve`` processes on
127.0.0.1 with ephemeral ports and temporary data dirs, runs every experiment with bounded counts
and time, stops every process it started and prints one table of figures. Each module holds one
experiment and exposes ``run(**limits) -> list[Row]``; ``tests/reliability`` runs a lighter,
seeded subset of each inside ``make test``.
"""
