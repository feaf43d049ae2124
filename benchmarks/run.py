"""Run every benchmark of certify and write its section of ``benchmarks/results.md``.

``make bench`` calls this file. Each benchmark module has ``main(argv=None) -> int`` and
writes (or replaces) its own section, keeping the others.
"""

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import atlas_bench  # noqa: E402  (the folder above is not a package)
import check_bench  # noqa: E402
import dimensions_bench  # noqa: E402
import flow_bench  # noqa: E402
import library_bench  # noqa: E402
import prove_bench  # noqa: E402
import size_bench  # noqa: E402
import sweep_bench  # noqa: E402


def main():
    """Run the benchmarks in turn; return the largest exit code."""
    return max(bench.main([]) for bench in (flow_bench, prove_bench, check_bench, size_bench,
                                            library_bench, sweep_bench, dimensions_bench,
                                            atlas_bench))


if __name__ == "__main__":
    sys.exit(main())
