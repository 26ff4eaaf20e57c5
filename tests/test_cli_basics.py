"""The command line's frame: help texts, exit statuses."""
import subprocess
import sys

from noiseproof.cli import build_parser, main


def test_top_level_help_lists_every_command(capsys):
    try:
        main(["--help"])
    except SystemExit as exc:
        assert exc.code == 0
    out = capsys.readouterr().out
    for name in ("demo", "inspect", "estimate", "optimise", "study", "pack", "batch"):
        assert name in out


def test_no_command_prints_help_and_exits_2(capsys):
    assert main([]) == 2
    assert "usage: noiseproof" in capsys.readouterr().out


def test_each_subcommand_has_help():
    parser = build_parser()
    sub = next(a for a in parser._actions if a.__class__.__name__ == "_SubParsersAction")
    for name, p in sub.choices.items():
        text = p.format_help()
        assert text.startswith("usage: noiseproof " + name)


def test_module_entry_point_runs():
    r = subprocess.run([sys.executable, "-m", "noiseproof", "--version"], capture_output=True, text=True)
    assert r.returncode == 0 and r.stdout.startswith("noiseproof ")
