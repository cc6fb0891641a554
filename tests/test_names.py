"""The README's "Names, defined once" lists are the names the code writes: run and evaluate JSON keys, each
recording's keys, and the Delta tables' columns."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest

from inboxes import table_inbox

from fleetsift.flows import night
from fleetsift.flows.cli import main
from fleetsift.store import TABLE_SCHEMAS
from fleetsift.tasks import stages

ROOT = Path(__file__).resolve().parent.parent


def documented() -> dict[str, tuple[set[str], set[str]]]:
    """README bullet label -> (names always present, names present only in some cases, written `name?`).

    Parenthesised text explains a name (values, sub-keys) and is not itself a list of names."""
    text = (ROOT / "README.md").read_text(encoding="utf-8")
    section = text.split("## Names, defined once", 1)[1].split("\n## ", 1)[0].split("\nWords:", 1)[0]
    out = {}
    for label, body in re.findall(r"^- \*\*(.+?)\*\*: (.*?)(?=^- \*\*|\Z)", section, flags=re.M | re.S):
        body = " ".join(body.split())
        while re.search(r"\([^()]*\)", body):
            body = re.sub(r"\([^()]*\)", "", body)
        names = re.findall(r"`([A-Za-z_]+\??)`", body)
        out[label] = ({n for n in names if not n.endswith("?")}, {n[:-1] for n in names if n.endswith("?")})
    return out


def test_the_readme_lists_parse():
    doc = documented()
    assert set(doc) == {"`fleetsift run --json`", "each of its `recordings`", "`fleetsift evaluate --json`",
                        "`runs` table", "`recordings` table", "`windows` table", "`reviews` table"}
    assert "store_version" in doc["`fleetsift run --json`"][0] and "plot" in doc["`fleetsift evaluate --json`"][1]
    assert "ok" not in doc["`runs` table"][0]  # a value in parentheses, not a column


@pytest.mark.parametrize("table", sorted(TABLE_SCHEMAS))
def test_table_columns_are_the_documented_ones(table):
    always, sometimes = documented()[f"`{table}` table"]
    assert not sometimes
    assert set(TABLE_SCHEMAS[table].names) == always


@pytest.fixture(scope="module")
def outputs(tmp_path_factory):
    """A night's run JSON (one recording too short to score) and the evaluate JSON of the same inbox."""
    root = tmp_path_factory.mktemp("names")
    inbox = table_inbox(root / "inbox", {"a": 30.0, "b": 30.0, "c": 30.0, "d": 2.0})
    (inbox / "labels.csv").write_text("recording_id,t_start_s,t_end_s\na,10,14\n")
    store = root / "store"
    plain = night.Steps(tables=stages.run_tables, embed=stages.run_embed, score=stages.run_score,
                        write=stages.run_write)
    night.run_night(plain, str(inbox), str(store), progress=False)
    return root, inbox, store


def _json(argv, capsys) -> dict:
    main(argv)
    return json.loads(capsys.readouterr().out)


def _check(actual: set[str], label: str):
    always, sometimes = documented()[label]
    assert actual - always - sometimes == set(), f"{label}: written but not in the README"
    assert always - actual == set(), f"{label}: in the README but not written"


def test_run_json_keys_are_the_documented_ones(outputs, capsys):
    root, inbox, store = outputs
    out = _json(["run", "--inbox", str(inbox), "--store", str(store), "--json"], capsys)
    _check(set(out), "`fleetsift run --json`")
    assert set(out["table_versions"]) == {"runs", "recordings", "windows"}
    statuses = set()
    for r in out["recordings"]:
        _check(set(r), "each of its `recordings`")
        statuses.add(r["status"])
    assert statuses == {"scored", "unscored"}


def test_evaluate_json_keys_are_the_documented_ones(outputs, capsys):
    root, inbox, store = outputs
    out = _json(["evaluate", "--inbox", str(inbox), "--labels", str(inbox / "labels.csv"), "--store", str(store),
                 "--json"], capsys)
    _check(set(out), "`fleetsift evaluate --json`")
    assert set(out["comparison_detectors"]) == {"isolation_forest", "local_outlier_factor"}
    assert set(next(iter(out["per_metric"].values()))) == {"n_flagged", "true_positives", "precision", "recall"}
