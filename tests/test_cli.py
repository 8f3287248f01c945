"""Tests of the command-line error boundary (``spatial_ev.cli.main``)."""

from __future__ import annotations

import pytest

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

    def test_warnings_shown_above_the_error_line(self, monkeypatch, capsys):
        import warnings

        from spatial_ev.errors import DroppedSpeciesWarning, InputError

        def failing(args):
            warnings.warn("dropped 'X'", DroppedSpeciesWarning)
            warnings.warn("dropped 'Y'", DroppedSpeciesWarning)
            raise InputError("bad cell")

        monkeypatch.setitem(COMMANDS, "check", COMMANDS["check"]._replace(execute=failing))
        assert main(["check", "--sites", "s.csv"]) == 2
        assert capsys.readouterr().err.splitlines() == [
            "warning (DroppedSpeciesWarning): dropped 'X'",
            "warning (DroppedSpeciesWarning): dropped 'Y'",
            "spatial-ev check: error: bad cell (after 2 warning(s) above: DroppedSpeciesWarning)"]

    def test_each_warning_once_in_the_command_lines_words(self, monkeypatch, capsys):
        import warnings

        from spatial_ev.errors import DroppedSpeciesWarning

        def noisy(args):
            for _ in range(7):  # e.g. one per map layer written
                warnings.warn("'crs' was not provided.  The output dataset will not have "
                              "projection information defined", UserWarning)
                warnings.warn("increase `max_vectors` to see finer scales", DroppedSpeciesWarning)
            return 0

        monkeypatch.setitem(COMMANDS, "run", COMMANDS["run"]._replace(execute=noisy))
        assert main(["run", "--sites", "s.csv", "--out", "o"]) == 0
        assert capsys.readouterr().err.splitlines() == [
            "warning (UserWarning): map layers are written without a coordinate reference "
            "system (local planar coordinates, --local-unit); a GIS will treat their "
            "coordinates as unreferenced",
            "warning (DroppedSpeciesWarning): increase --max-vectors to see finer scales"]


class TestOptionWords:
    """Library messages said with the options of the command that failed."""

    @pytest.mark.parametrize("command,message,said", [
        ("run", "n_permutations = 99 cannot reach the level", "--permutations 99 cannot reach "
                                                              "the level"),
        ("run", "`schemes` entry 'gabriel' is not 'distance'", "--weighting 'gabriel' is not "
                                                              "'distance'"),
        ("eigen", "method='k_nearest' needs `k` (e.g. 4); got None",
         "--graph k_nearest needs --neighbours (e.g. 4)"),
        ("eigen", "the graph is disconnected; increase `threshold` or leave it None, or pass "
                  "disconnected='allow'", "the graph is disconnected; increase --threshold or "
                                          "leave it out"),
        ("eigen", "give `max_vectors` (e.g. 200) or `finest_scale` (map units), or "
                  "solver='dense' (needs O(n²) memory)",
         "give --max-vectors (e.g. 200) or --finest-scale (map units)"),
        ("eigen", "keep='all' needs every eigenvector", "--keep all needs every eigenvector"),
        ("check", "pass crs= (EPSG code or WKT, --crs) or local_unit= for local planar "
                  "coordinates (--local-unit metre)",
         "pass --crs (EPSG code or WKT) or --local-unit for local planar coordinates "
         "(--local-unit metre)"),
        ("check", "pass x= and y= (command line: --x COL --y COL)", "pass --x COL --y COL"),
        ("check", "pass decimal=',' (command line: --decimal ,), or", "pass --decimal ',', or"),
        ("check", "(pass encoding='utf-16-le', --encoding utf-16-le)",
         "(pass --encoding utf-16-le)"),
        ("check", "pass the right site_id (--site-id)", "pass the right --site-id"),
        ("design", "n_simulations = 5 is too few", "--simulations 5 is too few"),
        # a value the user typed is left alone, and so is a layout's own key
        ("design", "layout 'grid:spacing=0' has no sites", "layout 'grid:spacing=0' has no "
                                                          "sites"),
        ("check", "column 'site_id' is empty", "column 'site_id' is empty"),
    ])
    def test_rewording(self, command, message, said):
        from spatial_ev.cli.common import in_option_words

        assert in_option_words(message, _words(command)) == said

    def test_every_alias_is_an_option_of_its_command(self):
        from spatial_ev.cli.common import PARAMETER_OPTIONS

        sub = next(a for a in build_parser()._actions if a.dest == "command")
        assert set(PARAMETER_OPTIONS) <= set(sub.choices)  # a command may need no alias
        for command, aliases in PARAMETER_OPTIONS.items():
            offered = {o for a in sub.choices[command]._actions for o in a.option_strings}
            assert set(aliases.values()) <= offered, command


def _words(command: str) -> dict[str, str]:
    sub = next(a for a in build_parser()._actions if a.dest == "command")
    return sub.choices[command].get_default("_option_names")
