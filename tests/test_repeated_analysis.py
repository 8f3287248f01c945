"""The repeated-survey analysis on the invented resurvey: the moving structure is detected, the
declining cluster is flagged; and the interaction test's type I error on the no-change variant."""

from __future__ import annotations

import pytest
import scipy.stats

from spatial_ev.datasets.resurvey import generate_resurvey
from spatial_ev.errors import InputError
from spatial_ev.input.repeated import read_repeated_survey
from spatial_ev.pipeline.repeated import RepeatedAnalysis, analyse_repeated


@pytest.fixture(scope="module")
def demo(repo_root):
    folder = repo_root / "data_demo" / "resurvey"
    return read_repeated_survey(folder / "sites.gpkg", folder / "species.csv")


@pytest.fixture(scope="module")
def analysis(demo) -> RepeatedAnalysis:
    return analyse_repeated(demo, n_permutations=199, site_permutations=9999, seed=20261202)


class TestDemo:
    def test_interaction_detected(self, analysis):
        st = analysis.space_time
        assert st.interaction_significant
        assert st.table.loc["interaction", "p_value"] <= 0.01
        # the broad structure is stable and strong: space within every survey
        assert st.within_surveys["significant"].all()

    def test_declining_cluster_flagged_and_nothing_else(self, analysis):
        truth = generate_resurvey().truth
        cluster = set(truth["declining_sites"])
        flagged = set(analysis.change.exceptional_sites)
        assert flagged <= cluster                       # no site outside the cluster
        assert len(flagged) >= len(cluster) - 2          # nearly all of the cluster
        table = analysis.change.table
        assert (table.loc[sorted(flagged), "direction"] == "loss").all()
        assert analysis.change.before == "2022" and analysis.change.after == "2024"

    def test_result_tables_and_summary(self, analysis):
        frame = analysis.to_frame()
        assert len(frame) == 220 and {"x", "y", "losses", "gains", "p_adjusted"} <= set(frame)
        s = analysis.summary()
        assert s["space_time"]["interaction_significant"] is True
        assert s["change"]["n_exceptional"] == len(analysis.change.exceptional_sites)
        assert s["parameters"]["seed"] == 20261202
        assert any("interaction is significant" in n for n in s["notes"])

    def test_validation(self, demo):
        with pytest.raises(InputError, match="no survey '2019'"):
            analyse_repeated(demo, compare=("2019", "2024"))
        with pytest.raises(InputError, match="twice"):
            analyse_repeated(demo, compare=("2024", "2024"))
        with pytest.raises(InputError, match="RepeatedSurvey"):
            analyse_repeated(demo.species)

    def test_too_few_permutations_said_in_notes(self, demo):
        a = analyse_repeated(demo, n_permutations=9, site_permutations=99, seed=1)
        assert any("no site can reach" in n for n in a.notes)
        assert a.change.exceptional_sites == []


def _validation_study():
    """validation/space_time_error_rate.py, imported as a module (the test and the validation
    script share the study)."""
    import importlib.util
    import sys
    from pathlib import Path

    name = "space_time_error_rate"
    if name not in sys.modules:
        path = Path(__file__).resolve().parents[1] / "validation" / f"{name}.py"
        spec = importlib.util.spec_from_file_location(name, path)
        module = importlib.util.module_from_spec(spec)
        sys.modules[name] = module
        spec.loader.exec_module(module)
    return sys.modules[name]


@pytest.mark.slow
def test_interaction_type_one_error_on_no_change_variant():
    """Type I error of the interaction test on the no-change resurvey: 500 replicate noise
    draws of 48 grid sites x 3 years x 40 taxa, 39 permutations each (rejection p <= 0.05 then
    happens with probability 2/40 = 0.05 under exchangeability [derived, Phipson & Smyth 2010
    p-value rule]). The rate must lie in the binomial 99 % interval around 0.05
    (scipy.stats.binom); design in validation/space_time_error_rate.py."""
    study = _validation_study().interaction_study(500, moving=False)
    lo, hi = scipy.stats.binom.interval(0.99, 500, 0.05)
    print(f"interaction type I error: {study['rate']:.3f} ({study['rejections']}/500); 99% "
          f"interval [{lo / 500:.3f}, {hi / 500:.3f}]")
    assert lo <= study["rejections"] <= hi
