"""Run the front-end unit tests (``node --test tests/js/``) as part of the one pytest command."""
import pathlib
import shutil
import subprocess

HERE = pathlib.Path(__file__).resolve().parent


def test_front_end_modules_pass_their_node_tests():
    node = shutil.which("node")
    assert node is not None, "Node.js 18+ is needed for the front-end tests: install it (e.g. apt-get install nodejs)"
    files = sorted(str(p) for p in HERE.glob("*.test.mjs"))
    assert files, "no *.test.mjs files found beside this test"
    done = subprocess.run([node, "--test", *files], capture_output=True, text=True, timeout=300)
    summary = [line for line in done.stdout.splitlines() if line.startswith("# ")]
    assert done.returncode == 0, "node --test failed:\n" + done.stdout[-6000:] + done.stderr[-2000:]
    assert any(line.startswith("# pass") and int(line.split()[-1]) > 0 for line in summary), summary
    assert "# fail 0" in summary, summary
