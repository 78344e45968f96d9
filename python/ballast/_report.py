"""``ballast.Report`` and ``ballast.RetrainResult``: results with their per-sample and per-epoch arrays."""

from __future__ import annotations

import json
import os
from typing import Any, Union

import numpy as np

from . import _native

PathLike = Union[str, "os.PathLike[str]"]

__all__ = ["Report", "RetrainResult"]


class Report:
    """The ``ballast.report/1`` report of a certify run, with per-sample results as numpy arrays."""

    __slots__ = ("_native", "_summary")

    def __init__(self, native: "_native.Report"):
        self._native = native
        self._summary = json.loads(native.summary_json())

    @classmethod
    def load(cls, path: PathLike) -> "Report":
        """Reads a saved report."""
        return cls(_native.Report.load(os.fspath(path)))

    # Summary figures.
    @property
    def summary(self) -> dict:
        """The report's summary (the ``summary`` object of the JSON report)."""
        return dict(self._summary)

    @property
    def samples(self) -> int:
        """Number of samples."""
        return self._summary["samples"]

    @property
    def clean_accuracy(self) -> float:
        """Fraction classified correctly without perturbation."""
        return self._summary["clean_accuracy"]

    @property
    def certified_accuracy(self) -> float:
        """certified / samples: a lower bound on robust accuracy."""
        return self._summary["certified_accuracy"]

    @property
    def empirical_robust_accuracy(self) -> float:
        """1 − (misclassified + counterexample) / samples: an upper bound on robust accuracy."""
        return self._summary["empirical_robust_accuracy"]

    @property
    def certified_lower_bound(self) -> float | None:
        """The one-sided Clopper–Pearson lower bound (with a confidence level), else None."""
        return self._summary.get("certified_lower_bound")

    @property
    def certified(self) -> int:
        """Number of certified samples."""
        return self._summary["certified"]

    @property
    def counterexample_count(self) -> int:
        """Number of samples with a validated counterexample."""
        return self._summary["counterexample"]

    @property
    def misclassified(self) -> int:
        """Number of samples wrong without perturbation."""
        return self._summary["misclassified"]

    @property
    def unresolved(self) -> int:
        """Number of samples neither certified nor refuted."""
        return self._summary["unresolved"]

    @property
    def verdict(self) -> str:
        """``pass``, ``fail``, ``undecided``, or ``none`` (no floor given)."""
        return self._native.verdict

    @property
    def exit_code(self) -> int:
        """The command line's exit code for the verdict: 0 met (or no floor), 1 not met, 3 undecided."""
        return self._native.exit_code

    @property
    def complete(self) -> bool:
        """False when the run stopped before every sample was decided."""
        return self._native.complete

    # Per-sample arrays.
    @property
    def status(self) -> np.ndarray:
        """Per sample: ``certified``, ``counterexample``, ``misclassified`` or ``unresolved``."""
        return np.array(self._native.status, dtype=object)

    @property
    def stage(self) -> np.ndarray:
        """Per sample: the stage that decided it (clean, attack, interval, linear, optimised_linear,
        lp, search)."""
        return np.array(self._native.stage, dtype=object)

    @property
    def margin_lower(self) -> np.ndarray:
        """Per sample: a sound lower bound on the margin (NaN where none was computed)."""
        return self._native.margin_lower

    @property
    def radius(self) -> np.ndarray:
        """Per sample: the certified radius (NaN unless ``certify(..., radius=True)``)."""
        return self._native.radius

    @property
    def index(self) -> np.ndarray:
        """Per sample: its row in ``X``."""
        return self._native.index_label_predicted[0]

    @property
    def label(self) -> np.ndarray:
        """Per sample: its class index."""
        return self._native.index_label_predicted[1]

    @property
    def predicted(self) -> np.ndarray:
        """Per sample: the predicted class index without perturbation."""
        return self._native.index_label_predicted[2]

    @property
    def counterexamples(self) -> np.ndarray:
        """The validated counterexamples (n × features), in the order of ``counterexample_indices``."""
        return self._native.counterexample_arrays()[2]

    @property
    def counterexample_indices(self) -> np.ndarray:
        """The rows of ``X`` the counterexamples belong to."""
        return self._native.counterexample_arrays()[0]

    @property
    def counterexample_classes(self) -> np.ndarray:
        """The class each counterexample is moved into."""
        return self._native.counterexample_arrays()[1]

    def to_json(self, path: PathLike) -> None:
        """Writes the report and, when there are counterexamples, ``NAME.counterexamples.csv`` beside
        it, as ``ballast certify --report`` does."""
        self._native.to_json(os.fspath(path))

    def to_json_string(self) -> str:
        """The report as JSON text."""
        return self._native.to_json_string()

    def sheet(self, folder: PathLike) -> tuple[str, str]:
        """Writes the sheet (``sheet.md`` and a self-contained ``sheet.html``) into ``folder``."""
        md, html = self._native.sheet(os.fspath(folder))
        return os.fspath(md), os.fspath(html)

    def to_pandas(self) -> Any:
        """The per-sample results as a ``pandas.DataFrame`` (needs pandas)."""
        try:
            import pandas as pd
        except ImportError:
            raise ImportError("Report.to_pandas needs pandas: pip install pandas") from None
        return pd.DataFrame({
            "index": self.index,
            "label": self.label,
            "predicted": self.predicted,
            "status": self.status,
            "stage": self.stage,
            "margin_lower": self.margin_lower,
            "seconds": self._native.seconds,
        })

    def __repr__(self) -> str:
        return (f"Report(samples={self.samples}, certified_accuracy={self.certified_accuracy:.4f}, "
                f"empirical_robust_accuracy={self.empirical_robust_accuracy:.4f}, verdict={self.verdict!r})")


class RetrainResult:
    """What :func:`retrain` measured: the verdict, the rounds, the multiplier history and the certify
    report of the returned model on the acceptance data."""

    __slots__ = ("_native", "_epochs", "_rounds")

    def __init__(self, native: "_native.RetrainResult"):
        self._native = native
        self._epochs = json.loads(native.epochs_json())
        self._rounds = json.loads(native.rounds_json())

    @property
    def verdict(self) -> str:
        """``met`` (the floor was proven on the acceptance data) or ``not_met``."""
        return self._native.verdict

    @property
    def exit_code(self) -> int:
        """The command line's exit code: 0 met, 1 not met."""
        return self._native.exit_code

    @property
    def cautions(self) -> list[str]:
        """Cautions about the verdict, as ``ballast retrain`` prints them: e.g. without an acceptance
        set the verdict is on the validation data, which also steered the rounds (optimistic)."""
        return list(self._native.cautions)

    @property
    def rounds(self) -> list[dict]:
        """One record per train-then-certify round."""
        return [dict(r) for r in self._rounds]

    @property
    def report(self) -> Report:
        """The certify report of the returned model on the acceptance data."""
        return Report(self._native.report)

    def _column(self, key: str) -> np.ndarray:
        return np.array([np.nan if e.get(key) is None else e[key] for e in self._epochs], dtype=np.float64)

    @property
    def epochs(self) -> np.ndarray:
        """The epoch numbers (1-based, counted across rounds)."""
        return np.array([e["epoch"] for e in self._epochs], dtype=np.int64)

    @property
    def multipliers(self) -> np.ndarray:
        """The multipliers at the end of every epoch (epochs × constraints: one, or one per class)."""
        rows = [e["multipliers"] for e in self._epochs]
        width = max((len(r) for r in rows), default=0)
        out = np.full((len(rows), width), np.nan)
        for i, r in enumerate(rows):
            out[i, : len(r)] = [np.nan if v is None else v for v in r]
        return out

    @property
    def clean_loss(self) -> np.ndarray:
        """Mean clean cross-entropy per epoch."""
        return self._column("clean_loss")

    @property
    def robust_loss(self) -> np.ndarray:
        """Mean robust loss per epoch."""
        return self._column("robust_loss")

    @property
    def robust_error(self) -> np.ndarray:
        """Robust error rate on the training batches per epoch (the constraint's measure)."""
        return self._column("robust_error")

    @property
    def epsilon_scale(self) -> np.ndarray:
        """Fraction of the budget in use at the end of every epoch (the ramp)."""
        return self._column("epsilon_scale")

    @property
    def validation_certified_accuracy(self) -> np.ndarray:
        """Certified accuracy on the validation data per epoch (sound linear bounds)."""
        return self._column("validation_certified_accuracy")

    @property
    def validation_clean_accuracy(self) -> np.ndarray:
        """Clean accuracy on the validation data per epoch."""
        return self._column("validation_clean_accuracy")

    def __repr__(self) -> str:
        r = self.report
        return (f"RetrainResult(verdict={self.verdict!r}, rounds={len(self._rounds)}, "
                f"epochs={len(self._epochs)}, certified_accuracy={r.certified_accuracy:.4f})")
