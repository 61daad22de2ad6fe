"""The README's headless example runs as written (source: README.md in this repository)."""
import pathlib
import re

import pandas as pd

ROOT = pathlib.Path(__file__).resolve().parent.parent


def test_readme_python_blocks_run(capsys):
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    blocks = re.findall(r"```python\n(.*?)```", text, flags=re.S)
    assert blocks, "README has no python example"
    ns: dict = {}
    for block in blocks:
        exec(compile(block, "README.md", "exec"), ns)
    study = ns["study"]
    # the exported code, run on the same data, gives the same parameters (source: statsmodels)
    out: dict = {"df": ns["df"]}
    exec(compile(study.to_code(), "<exported>", "exec"), out)
    pd.testing.assert_series_equal(out["result"].params, study.fit.params, check_names=False,
                                   rtol=1e-8)
    assert "## Steps" in study.audit()
