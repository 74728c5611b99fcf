"""The layer rule (docs/architecture.md): tests/lint/layers.py passes on the
tree, and catches a forbidden include and a loose file in a copy of it."""
import pathlib
import shutil
import subprocess

ROOT = pathlib.Path(__file__).resolve().parents[2]
CHECK = ["/usr/bin/python3", str(ROOT / "tests" / "lint" / "layers.py")]


def run(root=None):
    args = CHECK + (["--root", str(root)] if root else [])
    return subprocess.run(args, capture_output=True, text=True, timeout=60)


def copy_tree(tmp_path):
    for d in ("daemon", "drivers"):
        shutil.copytree(ROOT / d, tmp_path / d, ignore=shutil.ignore_patterns("www"))
    return tmp_path


def test_tree_keeps_the_rule():
    r = run()
    assert r.returncode == 0, r.stdout + r.stderr
    assert "keep the rule" in r.stdout


def test_cli_including_a_server_header_is_caught(tmp_path):
    root = copy_tree(tmp_path)
    f = root / "daemon" / "cli" / "cmd_check.c"
    f.write_text('#include "http.h"\n' + f.read_text())
    r = run(root)
    assert r.returncode == 1
    assert "daemon/cli/cmd_check.c:1: cli/ may not include server/http.h" in r.stdout


def test_core_including_a_driver_header_is_caught(tmp_path):
    root = copy_tree(tmp_path)
    f = root / "daemon" / "core" / "engine.c"
    f.write_text(f.read_text() + '\n#include "drv.h"\n')
    r = run(root)
    assert r.returncode == 1 and "core/ may not include drivers/drv.h" in r.stdout


def test_a_loose_file_in_daemon_is_caught(tmp_path):
    root = copy_tree(tmp_path)
    (root / "daemon" / "stray.c").write_text("int stray;\n")
    r = run(root)
    assert r.returncode == 1 and "stray.c" in r.stdout
