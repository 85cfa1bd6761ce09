"""tubetrack benchmark suite (issue 9): each step runs as a child process, measured next to
its floor (DuckDB's own CSV load of the same files) in the same run. See ``bench/RESULTS.md``.

Run ``python -m bench --small`` for a CI-sized check, ``python -m bench`` for the full size
(5,000 tubes, 10 million exposures).
"""
