"""The CLI's help: every option of every command says what it does and its default (or that it is required)."""

from __future__ import annotations

import argparse

import pytest

from fleetsift.flows.cli import _HelpFormatter, build_parser


def _commands(parser: argparse.ArgumentParser) -> dict[str, argparse.ArgumentParser]:
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return dict(sub.choices)


def undocumented(parser: argparse.ArgumentParser) -> list[str]:
    """Options whose rendered help is missing, or names neither a default nor that the option is required."""
    fmt = _HelpFormatter(parser.prog)
    bad = []
    for a in parser._actions:
        if isinstance(a, argparse._HelpAction) or not a.option_strings:
            continue
        text = fmt._get_help_string(a) if a.help not in (None, argparse.SUPPRESS) else ""
        if not text.strip() or not ("default" in text or "required" in text):
            bad.append(f"{parser.prog} {'/'.join(a.option_strings)}: {text!r}")
    return bad


def test_every_option_has_help_with_its_default():
    commands = _commands(build_parser())
    assert {"run", "evaluate", "review", "report", "sweep", "history", "maintain", "serve", "demo",
            "make-sample"} <= set(commands)
    bad = [b for p in commands.values() for b in undocumented(p)]
    assert not bad, "options without help or default:\n" + "\n".join(bad)


def test_the_check_catches_an_option_without_help():
    p = argparse.ArgumentParser(prog="x", formatter_class=_HelpFormatter)
    p.add_argument("--bare")
    p.add_argument("--hidden", help=argparse.SUPPRESS)
    p.add_argument("--vague", help="something")  # default None: help must say the default in words
    p.add_argument("--fine", default=3, help="a number")
    p.add_argument("--flag", action="store_true", help="a switch")
    assert [b.split(":")[0] for b in undocumented(p)] == ["x --bare", "x --hidden", "x --vague"]


@pytest.mark.parametrize("command", sorted(_commands(build_parser())))
def test_help_renders_with_defaults(command, capsys):
    with pytest.raises(SystemExit) as e:
        build_parser().parse_args([command, "--help"])
    assert e.value.code == 0
    out = " ".join(capsys.readouterr().out.split())  # argparse wraps lines
    assert "usage: fleetsift " + command in out
    if command == "run":  # the formatter appends the values a user would otherwise have to look up
        assert "(default: local)" in out and "(default: 0.0)" in out and "(default: off)" in out


def test_top_level_help_lists_the_exit_codes(capsys):
    with pytest.raises(SystemExit):
        build_parser().parse_args(["--help"])
    out = " ".join(capsys.readouterr().out.split())
    from fleetsift.errors import EXIT_CODES

    for v in EXIT_CODES.values():
        assert f"{v['code']} {' '.join(v['meaning'].split())}" in out
