"""The exit-code table (fleetsift.errors.EXIT_CODES, README "Exit codes"), case by case, in-process.

The nights here are video-free table inboxes scored without Prefect (the plain stage functions first, then the
CLI's direct path for a night whose stage outputs are all cached), so the file stays fast.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from inboxes import table_inbox

from fleetsift.errors import EXIT_CODES
from fleetsift.flows import night
from fleetsift.flows.cli import main
from fleetsift.store import Store
from fleetsift.tasks import stages

ROOT = Path(__file__).resolve().parent.parent
CODE = {k: v["code"] for k, v in EXIT_CODES.items()}
PLAIN = night.Steps(tables=stages.run_tables, embed=stages.run_embed, score=stages.run_score,
                    write=stages.run_write)


@pytest.fixture(scope="module")
def fleet(tmp_path_factory):
    """Two scored stores: one whose recordings all scored, one with a recording too short for a window."""
    root = tmp_path_factory.mktemp("exits")
    good = table_inbox(root / "good", {"a": 30.0, "b": 30.0, "c": 30.0})
    short = table_inbox(root / "short", {"a": 30.0, "b": 30.0, "c": 30.0, "d": 2.0})
    for inbox in (good, short):
        night.run_night(PLAIN, str(inbox), str(root / f"store-{inbox.name}"), progress=False)
    return root


def _run(*argv, capsys=None):
    code = main(list(argv))
    return code, (capsys.readouterr() if capsys else None)


def test_ok_every_recording_scored(fleet, capsys):
    code, out = _run("run", "--inbox", str(fleet / "good"), "--store", str(fleet / "store-good"), "--json",
                     capsys=capsys)
    assert code == CODE["ok"] == 0, out.err


def test_unscored_recording_exits_3_and_says_why(fleet, capsys):
    import json

    code, out = _run("run", "--inbox", str(fleet / "short"), "--store", str(fleet / "store-short"), "--json",
                     capsys=capsys)
    assert code == CODE["unscored"] == 3, out.err
    js = json.loads(out.out)
    assert [r["recording_id"] for r in js["unscored"]] == ["d"]
    assert js["quarantined"] == js["unscored"]  # the deprecated name, kept for one release
    assert "unscored d:" in out.err
    recs = Store(fleet / "store-short").read("recordings")
    assert set(recs.loc[recs["recording_id"] == "d", "status"]) == {"unscored"}


def test_missing_inbox_is_reported_before_any_store_folder(tmp_path, capsys):
    store = tmp_path / "store"
    code, out = _run("run", "--inbox", str(tmp_path / "nope"), "--store", str(store), capsys=capsys)
    assert code == CODE["input_error"] == 1
    assert "inbox" in out.err and "no such folder" in out.err and "Traceback" not in out.err
    assert "profile" not in out.err
    assert not store.exists()


def test_missing_profile_is_reported_before_any_store_folder(tmp_path, capsys):
    (tmp_path / "inbox" / "r1").mkdir(parents=True)
    store = tmp_path / "store"
    code, out = _run("run", "--inbox", str(tmp_path / "inbox"), "--store", str(store), capsys=capsys)
    assert code == 1 and "profile.toml" in out.err and "no such file" in out.err
    assert not store.exists()


@pytest.mark.parametrize("command", [["report", "--out", "x.html"], ["history"], ["maintain"],
                                     ["review", "--run", "r", "--recording", "a", "--verdict", "normal"]])
def test_missing_store_exits_1_creates_nothing(tmp_path, capsys, command):
    store = tmp_path / "missing"
    code, out = _run(command[0], "--store", str(store), *command[1:], capsys=capsys)
    assert code == 1, out.err
    assert "Traceback" not in out.err and "store" in out.err and "no such folder" in out.err
    assert not store.exists() and not (tmp_path / "x.html").exists()


def test_report_of_unknown_run_exits_1(fleet, tmp_path, capsys):
    code, out = _run("report", "--store", str(fleet / "store-good"), "--run", "no-such-run",
                     "--out", str(tmp_path / "r.html"), capsys=capsys)
    assert code == 1 and "no-such-run" in out.err and "Traceback" not in out.err


def test_evaluate_missing_labels_exits_1_before_scoring(fleet, tmp_path, capsys):
    store = tmp_path / "eval-store"
    code, out = _run("evaluate", "--inbox", str(fleet / "good"), "--labels", str(tmp_path / "none.csv"),
                     "--store", str(store), capsys=capsys)
    assert code == 1 and "--labels" in out.err and "no such file" in out.err
    assert not store.exists()


def test_usage_error_exits_2(capsys):
    with pytest.raises(SystemExit) as e:
        main(["run", "--no-such-option"])
    assert e.value.code == CODE["usage"] == 2


@pytest.mark.parametrize("command", ["run", "evaluate", "sweep", "maintain", "review"])
def test_locked_store_exits_4(fleet, tmp_path, capsys, command):
    store = fleet / "store-good"
    inbox = str(fleet / "good")
    argv = {"run": ["run", "--inbox", inbox, "--store", str(store)],
            "evaluate": ["evaluate", "--inbox", inbox, "--labels", str(_labels(tmp_path)), "--store", str(store)],
            "sweep": ["sweep", "--inbox", inbox, "--labels", str(_labels(tmp_path)), "--store", str(store),
                      "--out", str(tmp_path / "sweep")],
            "maintain": ["maintain", "--store", str(store)],
            "review": ["review", "--store", str(store), "--run", "r", "--recording", "a", "--verdict", "normal"],
            }[command]
    with Store(store).lock():
        code, out = _run(*argv, capsys=capsys)
    assert code == CODE["locked"] == 4, out.err
    assert "being written by pid" in out.err and "Traceback" not in out.err


def _labels(tmp_path: Path) -> Path:
    p = tmp_path / "labels.csv"
    p.write_text("recording_id,t_start_s,t_end_s\na,10,14\n")
    return p


def test_serve_without_server_exits_5(fleet, tmp_path, capsys, monkeypatch):
    monkeypatch.delenv("PREFECT_API_URL", raising=False)
    store = tmp_path / "serve-store"
    code, out = _run("serve", "--inbox", str(fleet / "good"), "--store", str(store), capsys=capsys)
    assert code == CODE["no_server"] == 5
    assert "PREFECT_API_URL" in out.err and not store.exists()


def test_serve_missing_inbox_exits_1(tmp_path, capsys, monkeypatch):
    monkeypatch.setenv("PREFECT_API_URL", "http://127.0.0.1:9/api")  # never contacted: the inbox check is first
    code, out = _run("serve", "--inbox", str(tmp_path / "nope"), "--store", str(tmp_path / "s"), capsys=capsys)
    assert code == 1 and "inbox" in out.err and not (tmp_path / "s").exists()


def test_readme_exit_code_table_is_the_cli_table():
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text.split("## Exit codes", 1)[1].split("\n## ", 1)[0]
    rows = dict(re.findall(r"^\| (\d) \| (.+?) \|$", section, flags=re.M))
    assert {int(k): " ".join(v.split()) for k, v in rows.items()} == \
        {v["code"]: " ".join(v["meaning"].split()) for v in EXIT_CODES.values()}


def test_deprecated_label_header_reads_with_one_plain_line(fleet, tmp_path, capsys):
    import subprocess
    import sys

    from cli_run import cli_env

    labels = tmp_path / "old.csv"
    labels.write_text("recording,start_s,end_s\na,10,14\n")
    code = ("import warnings; from fleetsift.flows.cli import main; warnings.simplefilter('default'); "
            "from fleetsift.scoring.evaluation import read_labels; main(['history', '--store', %r]); "
            "read_labels(%r)" % (str(fleet / "store-good"), str(labels)))
    p = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=cli_env(), timeout=120)
    assert p.returncode == 0, p.stderr
    assert p.stderr.strip() == (f"fleetsift: deprecated: {labels}: label columns recording,start_s,end_s are "
                                "deprecated: name them recording_id,t_start_s,t_end_s")
