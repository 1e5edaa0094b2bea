"""The forest plot writes a readable file in each format, on log and identity scales.

Data: the BCG vaccine trials (Colditz et al. 1994, JAMA 271:698), shared with
test_frequentist.py. Text checks render the SVG with text kept as text (svg.fonttype none).
"""

from __future__ import annotations

import math
from pathlib import Path
from types import SimpleNamespace

import matplotlib
import pytest

from registry.errors import InputError
from registry.report.forest import forest_plot
from registry.synthesis.frequentist import pool
from tests.test_frequentist import SE, Y

matplotlib.use("Agg")

LABELS = [f"Trial {i + 1}" for i in range(len(Y))]
SIGNATURES = {"png": b"\x89PNG\r\n\x1a\n", "pdf": b"%PDF", "svg": b"<?xml"}


@pytest.mark.parametrize("fmt", ["png", "svg", "pdf"])
@pytest.mark.parametrize("scale", ["log", "identity"])
def test_writes_a_non_empty_file(tmp_path: Path, fmt: str, scale: str) -> None:
    out = forest_plot(
        tmp_path / f"forest.{fmt}",
        LABELS,
        Y,
        SE,
        pool(Y, SE, "reml"),
        scale=scale,
        title="BCG vaccine trials",
    )
    assert out == tmp_path / f"forest.{fmt}"
    data = out.read_bytes()
    assert len(data) > 1000
    assert data.startswith(SIGNATURES[fmt])


def svg_text(path: Path, *args, **kwargs) -> str:
    with matplotlib.rc_context({"svg.fonttype": "none"}):
        forest_plot(path, *args, **kwargs)
    return path.read_text()


def test_log_scale_shows_ratios(tmp_path: Path) -> None:
    text = svg_text(tmp_path / "f.svg", LABELS, Y, SE, pool(Y, SE, "reml"), scale="log")
    # REML pooled risk ratio for BCG, recalled from memory of published analyses of this
    # dataset: 0.49 [0.34, 0.70].
    assert "0.49 [0.34, 0.70]" in text
    # Aronson 1948: RR = (4/123)/(11/139), computed here from the published counts.
    rr = (4 / 123) / (11 / 139)
    assert f"{rr:.2f} [" in text
    assert "Weight" in text and "%" in text
    assert "analysis scale: log" in text
    assert "Trial 13" in text


def test_identity_scale_shows_analysis_values(tmp_path: Path) -> None:
    res = pool(Y, SE, "reml")
    text = svg_text(tmp_path / "f.svg", LABELS, Y, SE, res, natural=False, scale="log")
    lo, hi = res.ci
    assert f"{res.mu:.2f} [{lo:.2f}, {hi:.2f}]" in text
    assert f"{math.exp(res.mu):.2f} [" not in text


def test_duck_typed_result_without_weights_or_prediction(tmp_path: Path) -> None:
    # A result from another method only needs these attributes.
    result = SimpleNamespace(
        mu=-0.7, ci=(-1.1, -0.3), prediction=None, method="bayes", k=len(Y), tau2=0.3, i2=None
    )
    text = svg_text(tmp_path / "f.svg", LABELS, Y, SE, result, scale="log")
    assert "not available" in text
    assert "Weight" not in text


def test_two_studies_have_no_prediction_row(tmp_path: Path) -> None:
    res = pool(Y[:2], SE[:2], "dl")
    text = svg_text(tmp_path / "f.svg", LABELS[:2], Y[:2], SE[:2], res, scale="log")
    assert "not available" in text


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        ({"path_name": "f.jpg"}, "path"),
        ({"scale": "sqrt"}, "scale"),
        ({"labels": LABELS[:3]}, "labels"),
        ({"weights": [50.0, 50.0]}, "weights"),
    ],
)
def test_bad_arguments_are_input_errors(tmp_path: Path, kwargs: dict, field: str) -> None:
    path = tmp_path / kwargs.pop("path_name", "f.png")
    labels = kwargs.pop("labels", LABELS)
    with pytest.raises(InputError) as info:
        forest_plot(path, labels, Y, SE, pool(Y, SE, "dl"), **kwargs)
    assert info.value.field == field
    assert not path.exists()
