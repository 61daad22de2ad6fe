"""Print the NIST StRD accuracy table (markdown) for the README.

Usage: ``python tests/benchmarks/nist_table.py [NIST_JSON_FOLDER]``.  Without a folder it looks
for the workspace copy beside the project; the Norris (scipy's file) and Longley (statsmodels'
data) rows are printed in any case.  Scores are LREs (correct significant digits, capped at 15):
the minimum over coefficients, over their standard deviations, and the residual SD.
"""
from __future__ import annotations

import pathlib
import sys

HERE = pathlib.Path(__file__).resolve()
sys.path.insert(0, str(HERE.parents[1] / "model"))

from test_ols import nist_table_markdown  # noqa: E402


def main(argv=None):
    argv = sys.argv[1:] if argv is None else argv
    folder = pathlib.Path(argv[0]) if argv else HERE.parents[2].parent / "shared" / "reference" / "nist"
    print(nist_table_markdown(folder if folder.is_dir() else None))


if __name__ == "__main__":
    main()
