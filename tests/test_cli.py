"""Tests of the command-line error boundary (``spatial_ev.cli.main``)."""

from __future__ import annotations

import pytest

from spatial_ev.cli import check as cli_check
from spatial_ev.cli.main import COMMANDS, build_parser, main


def _one_line(err: str) -> str:
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in err, err
    return lines[0]


class TestMain:
    def test_parser_lists_the_commands(self):
        text = build_parser().format_help()
        for name in ("check", "eigen", "run", "demo"):
            assert name in text

    def test_bad_input_exit_2(self, tmp_path, capsys):
        assert main(["check", "--sites", str(tmp_path / "nothing.csv")]) == 2
        line = _one_line(capsys.readouterr().err)
        assert line.startswith("spatial-ev check: error: sites file") and "does not exist" in line

    def test_unexpected_exception_is_one_line_and_exit_1(self, monkeypatch, capsys):
        def broken(args):
            raise KeyError("variable")

        monkeypatch.setitem(COMMANDS, "check", COMMANDS["check"]._replace(execute=broken))
        assert main(["check", "--sites", "s.csv"]) == 1
        line = _one_line(capsys.readouterr().err)
        assert "internal error (KeyError: 'variable')" in line and "--debug" in line
        with pytest.raises(KeyError):
            main(["check", "--sites", "s.csv", "--debug"])

    def test_operating_system_error_exit_2(self, monkeypatch, tmp_path, capsys):
        def unwritable(args):
            raise PermissionError(13, "Permission denied", str(tmp_path / "out"))

        monkeypatch.setitem(COMMANDS, "check", COMMANDS["check"]._replace(execute=unwritable))
        assert main(["check", "--sites", "s.csv"]) == 2
        line = _one_line(capsys.readouterr().err)
        assert "cannot access" in line and "Permission denied" in line and "out'" in line

    def test_output_folder_inside_a_file(self, small_survey_files, tmp_path, capsys):
        blocker = tmp_path / "notes.txt"
        blocker.write_text("not a folder")
        args = ["run", "--sites", str(small_survey_files["sites"]),
                "--species", str(small_survey_files["species"]), "--x", "easting",
                "--y", "northing", "--crs", "EPSG:32633", "--weighting", "distance",
                "--permutations", "19", "--seed", "1", "--quiet",
                "--out", str(blocker / "run")]
        assert main(args) == 2
        _one_line(capsys.readouterr().err)
        assert blocker.read_text() == "not a folder"


class TestWarnings:
    def test_warnings_follow_a_successful_command(self, monkeypatch, capsys):
        import warnings

        from spatial_ev.errors import DroppedSpeciesWarning

        def noisy(args):
            warnings.warn("dropped 'X'", DroppedSpeciesWarning)
            print("described")
            return 0

        monkeypatch.setitem(COMMANDS, "check", COMMANDS["check"]._replace(execute=noisy))
        assert main(["check", "--sites", "s.csv"]) == 0
        out, err = capsys.readouterr()
        assert out == "described\n"
        assert err == "warning (DroppedSpeciesWarning): dropped 'X'\n"

    def test_warnings_counted_in_the_error_line(self, monkeypatch, capsys):
        import warnings

        from spatial_ev.errors import DroppedSpeciesWarning, InputError

        def failing(args):
            warnings.warn("dropped 'X'", DroppedSpeciesWarning)
            warnings.warn("dropped 'Y'", DroppedSpeciesWarning)
            raise InputError("bad cell")

        monkeypatch.setitem(COMMANDS, "check", COMMANDS["check"]._replace(execute=failing))
        assert main(["check", "--sites", "s.csv"]) == 2
        line = _one_line(capsys.readouterr().err)
        assert line == ("spatial-ev check: error: bad cell (after 2 warning(s): "
                        "DroppedSpeciesWarning; --debug shows them)")
