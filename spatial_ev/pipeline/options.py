"""How the pipeline's steps run their permutation tests, as one value instead of loose
arguments threaded through every step."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

from spatial_ev._validation import check_int, check_option
from spatial_ev.errors import InputError
from spatial_ev.inference.engines import ENGINES

__all__ = ["DEFAULT_OPTIONS", "STEP_TESTS", "StepOptions"]

#: how forward-selection step tests draw permutations (:attr:`StepOptions.step_tests`)
STEP_TESTS = ("full", "sequential", "shared")


@dataclass(frozen=True)
class StepOptions:
    """Permutations and execution of every test a pipeline step runs.

    Attributes
    ----------
    n_permutations : int
        Permutations per test (≥ 19).
    engine : {"local", "processes", "dask"}
        Where permutation batches (and, when schemes are compared, each scheme) run.
    scheduler : object, optional
        A ``dask.distributed`` scheduler address or client (``engine="dask"``).
    n_workers : int, optional
        Worker threads or processes (default: the engine's, one per core).
    progress : callable, optional
        Called with a short message at each stage and test; the steps never print.
    step_tests : {"full", "sequential", "shared"}
        Forward-selection step tests draw every permutation (``"full"``), stop once
        "p ≤ α?" is settled with a bounded resampling risk (``"sequential"``;
        :class:`~spatial_ev.inference.null.SequentialRule`), or use one set of permutations
        for every step of a selection, updated as the model grows (``"shared"``;
        :class:`~spatial_ev.inference.permutation.SharedStepPermutations`). Global and
        fraction tests always draw the full count.

    Examples
    --------
    >>> options = StepOptions(n_permutations=199)
    >>> options.tests()
    {'n_permutations': 199, 'engine': 'local', 'scheduler': None}
    >>> StepOptions(step_tests="sequential").selection_tests()["sequential_steps"]
    True
    """

    n_permutations: int = 999
    engine: str = "local"
    scheduler: Any = field(default=None, repr=False, compare=False)
    n_workers: int | None = field(default=None, compare=False)
    progress: Callable[[str], None] | None = field(default=None, repr=False, compare=False)
    step_tests: str = "full"

    def __post_init__(self) -> None:
        check_int("n_permutations", self.n_permutations, low=1)
        check_option("step_tests", self.step_tests, STEP_TESTS)
        check_option("engine", self.engine, ENGINES)
        if self.n_workers is not None:
            check_int("n_workers", self.n_workers, low=1)
        if self.progress is not None and not callable(self.progress):
            raise InputError(f"`progress` must be a callable taking one message (str); got "
                             f"{type(self.progress).__name__}")

    def tests(self) -> dict[str, Any]:
        """Keyword arguments of a permutation test (``n_permutations``, ``engine``,
        ``scheduler``)."""
        return {"n_permutations": self.n_permutations, "engine": self.engine,
                "scheduler": self.scheduler}

    def selection_tests(self) -> dict[str, Any]:
        """Keyword arguments of a forward selection or scheme comparison: those of
        :meth:`tests`, ``sequential_steps`` and ``shared_steps``."""
        return {**self.tests(), "sequential_steps": self.step_tests == "sequential",
                "shared_steps": self.step_tests == "shared"}

    def say(self, message: str) -> None:
        """Pass a stage message to ``progress`` (nothing when it is None)."""
        if self.progress is not None:
            self.progress(message)


DEFAULT_OPTIONS = StepOptions()
"""The steps' default: 999 permutations per test, local engine, no progress messages."""
