"""``python -m bench [--small] [--repeat N] [--tubes N] [--exposures N]``: run the benchmark."""

from bench.run import main

if __name__ == "__main__":
    raise SystemExit(main())
