"""``python -m benchmarks``: run the benchmark suite (see :mod:`benchmarks.run`)."""

from benchmarks.run import main

raise SystemExit(main())
