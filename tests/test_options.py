"""One name per concept across commands, and every option's help states its default
(issue 10; the conventions of DEVELOPERS.md)."""

import argparse

import pytest

from turnstamp.commands.main import build_parser


def subparsers():
    parser = build_parser()
    action = next(a for a in parser._actions  # noqa: SLF001
                  if isinstance(a, argparse._SubParsersAction))  # noqa: SLF001
    return action.choices


def options(skip=("tag",)):
    """(command, parser, action) of every option; ``tag`` is its own module's concern."""
    for name, parser in subparsers().items():
        if name in skip:
            continue
        for action in parser._actions:  # noqa: SLF001
            if action.option_strings and not isinstance(action, argparse._HelpAction):  # noqa: SLF001
                yield name, parser, action


def test_every_option_states_its_default_or_is_required():
    silent = []
    for command, parser, action in options():
        if action.required:
            continue
        formatter = parser._get_formatter()  # noqa: SLF001
        text = formatter._format_action(action)  # noqa: SLF001
        if "default" not in text.lower():
            silent.append(f"{command} {'/'.join(action.option_strings)}")
    assert not silent, silent


def test_one_name_per_concept():
    names = {(command, option) for command, _, action in options(skip=())
             for option in action.option_strings}
    flat = {option for _, option in names}
    # retired spellings of the same concepts
    assert not {"--to", "--cache", "--scale"} & flat
    assert ("report", "--out-dir") in names and ("demo", "--out-dir") in names
    assert ("table", "--table-cache") in names
    assert "--out" not in {o for c, o in names if c in ("demo", "report")}  # folders: --out-dir
    for command in ("table", "tag"):
        assert (command, "--site") in names
    for command, _, action in options():
        if action.option_strings == ["--site"]:
            assert action.required, f"{command} --site must be given, never the demo site"
        if action.option_strings == ["--json"] or action.option_strings == ["--quiet"]:
            assert isinstance(action, argparse._StoreTrueAction)  # noqa: SLF001
    assert "--table-cache" in flat


@pytest.mark.parametrize("command", ["simulate", "demo"])
def test_fault_help_lists_every_fault_kind(command):
    from turnstamp.core.simulate import FAULT_KINDS

    fault = next(a for a in subparsers()[command]._actions  # noqa: SLF001
                 if a.option_strings == ["--fault"])
    for kind in FAULT_KINDS:
        assert kind in fault.help


def test_simulate_says_what_it_simulates(capsys):
    with pytest.raises(SystemExit):
        build_parser().parse_args(["simulate", "--help"])
    text = capsys.readouterr().out
    assert "Lantern" in text and "--config" in text and "your own" in text
