"""Shared inputs of the reliability tests: the bad-input corpus, a library and a model made from its good files."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import pytest

from absolve.cli import main

from _reliability import GOOD


@dataclass(frozen=True)
class Made:
    """A library calibrated and a PLS model trained from the corpus's good files (by the command line itself).

    Attributes
    ----------
    library, model : Path
        The files ``absolve calibrate`` and ``absolve train`` wrote.
    """

    library: Path
    model: Path

    @property
    def library_text(self) -> str:
        return self.library.read_text(encoding="utf-8")

    @property
    def model_text(self) -> str:
        return self.model.read_text(encoding="utf-8")


@pytest.fixture(scope="session")
def made(tmp_path_factory: pytest.TempPathFactory) -> Made:
    folder = tmp_path_factory.mktemp("made")
    library, model = folder / "library.json", folder / "model.json"
    calibrate = ["calibrate", str(GOOD / "standards.csv"), "--standards", str(GOOD / "standards_concentrations.csv"), "--unit", "mg/L", "--out", str(library)]
    train = ["train", str(GOOD / "mixtures.csv"), "--concentrations", str(GOOD / "mixture_concentrations.csv"), "--unit", "mg/L", "--folds", "4", "--out", str(model)]
    assert main(calibrate) == 0
    assert main(train) == 0
    return Made(library, model)
