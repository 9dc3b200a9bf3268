"""`dipshape train` and `dipshape models ...`: registering, listing, activating, promoting."""

from __future__ import annotations

import json

import pytest
from threadpoolctl import threadpool_limits
from typer.testing import CliRunner

from service.cli import app
from training.registry import active_version, list_models

runner = CliRunner()


@pytest.fixture(scope="module")
def registry(tmp_path_factory):
    root = tmp_path_factory.mktemp("registry")
    cache = tmp_path_factory.mktemp("cache")
    with threadpool_limits(1):
        for seed in (1, 2):
            result = runner.invoke(app, ["train", "--simulated", "250", "--seed", str(seed),
                                         "--registry", str(root), "--cache", str(cache),
                                         "--name", f"m{seed}"])
            assert result.exit_code == 0, result.output
    return root


def test_train_registers_inactive_versions_with_their_command(registry):
    cards = list_models(registry)
    assert len(cards) == 2
    assert active_version(registry) is None
    assert all(c.command.startswith("dipshape train") for c in cards)
    assert all((registry / c.version / "report" / "report.html").is_file() for c in cards)


def test_list_show_and_activate(registry):
    versions = [c.version for c in list_models(registry)]
    out = runner.invoke(app, ["models", "list", "--registry", str(registry)])
    assert out.exit_code == 0 and all(v in out.output for v in versions)
    shown = runner.invoke(app, ["models", "show", versions[0], "--registry", str(registry)])
    card = json.loads(shown.output)
    assert card["version"] == versions[0] and len(card["feature_names"]) > 50
    act = runner.invoke(app, ["models", "activate", versions[0], "--registry", str(registry)])
    assert act.exit_code == 0 and active_version(registry) == versions[0]
    bad = runner.invoke(app, ["models", "activate", "nope", "--registry", str(registry)])
    assert bad.exit_code != 0 and "model_not_found" in bad.output


def test_promote_compares_on_the_same_set_and_respects_force(registry):
    versions = [c.version for c in list_models(registry)]
    runner.invoke(app, ["models", "activate", versions[0], "--registry", str(registry)])
    args = ["models", "promote", versions[1], "--registry", str(registry), "--n", "60"]
    with threadpool_limits(1):
        result = runner.invoke(app, args)
    lines = [ln for ln in result.output.splitlines() if "macro-F1" in ln]
    f1 = [float(ln.rsplit(" ", 1)[1]) for ln in lines]
    assert len(f1) == 2
    if f1[0] < f1[1]:
        # a worse candidate is refused and the active model stays
        assert result.exit_code == 1 and active_version(registry) == versions[0]
        with threadpool_limits(1):
            forced = runner.invoke(app, [*args, "--force"])
        assert forced.exit_code == 0
    else:
        assert result.exit_code == 0
    assert active_version(registry) == versions[1]


def test_bad_train_arguments(tmp_path):
    r = runner.invoke(app, ["train", "--preset", "huge", "--registry", str(tmp_path)])
    assert r.exit_code == 2 and "invalid_parameter" in r.output
    r = runner.invoke(app, ["train", "--labels", "x.csv", "--registry", str(tmp_path)])
    assert r.exit_code == 2 and "--segments" in r.output


@pytest.mark.slow
def test_retrain_on_group_labels_with_a_class_of_their_own(tmp_path):
    """A group's folder of labelled light curves, with a class beyond the five, is learnt end
    to end; the report evaluates the group's held-out rows apart from the simulated ones, and
    the new version stays inactive."""
    import pandas as pd

    from training.simulate import simulate_dataset, write_dataset

    folder = tmp_path / "group"
    segments = (simulate_dataset(100, seed=41, id_prefix="LS-g")
                + simulate_dataset(90, seed=42, classes=("variability",), id_prefix="LS-v"))
    labels = pd.read_csv(write_dataset(segments, folder))
    labels.loc[labels["subtype"] == "pulsation", "label"] = "pulsator"
    # enough for every split: calibration needs >= 5 of each class (20 % of the rows)
    assert (labels["label"] == "pulsator").sum() >= 28
    missing = pd.DataFrame({"id": ["LS-gone"], "label": ["planet"]})
    pd.concat([labels[["id", "label"]], missing]).to_csv(tmp_path / "labels.csv", index=False)
    root = tmp_path / "registry"
    with threadpool_limits(1):
        result = runner.invoke(app, ["train", "--labels", str(tmp_path / "labels.csv"),
                                     "--segments", str(folder), "--simulated", "250",
                                     "--seed", "3", "--registry", str(root), "--name", "group",
                                     "--version", "group-1"])
    assert result.exit_code == 0, result.output
    # the label whose segment is missing is reported
    assert "LS-gone" in result.output and "pulsator" in result.output
    (card,) = list_models(root)
    assert card.classes[-1] == "pulsator" and not card.active
    assert active_version(root) is None
    names = [m["name"] for m in card.metrics["models"]]
    assert "calibrated on group rows" in names and "calibrated on simulated rows" in names
    group = next(m for m in card.metrics["models"] if m["name"] == "calibrated on group rows")
    assert group["n_samples"] == pytest.approx(0.2 * 190, abs=3)
    assert "pulsator" in group["f1"]
    assert "calibrated on group rows" in (root / "group-1" / "report" / "report.html").read_text()


def test_evaluate_a_version_on_fresh_data_and_write_its_report(registry, tmp_path):
    version = list_models(registry)[0].version
    out = tmp_path / "eval"
    with threadpool_limits(1):
        result = runner.invoke(app, ["evaluate", version, "--registry", str(registry),
                                     "--n", "100", "--seed", "9", "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert f"{version} on 100 fresh simulated segments (seed 9): macro-F1 " in result.output
    assert "BIC baseline" in result.output and "triage, not a discovery" in result.output
    metrics = json.loads((out / "metrics.json").read_text())
    assert metrics["n_samples"] == 100
    assert sum(row["support"] for row in metrics["per_class"].values()) == 100
    # the printed macro-F1 is the report's (checked against scikit-learn in test_report.py)
    assert f"macro-F1 {metrics['macro_f1']:.3f}" in result.output
    assert (out / "report.html").is_file() and (out / "confusion_matrix.png").is_file()


def test_evaluate_refuses_an_unknown_version_and_half_a_label_set(registry, tmp_path):
    result = runner.invoke(app, ["evaluate", "nope", "--registry", str(registry), "--n", "50"])
    assert result.exit_code == 1 and "model_not_found" in result.output
    result = runner.invoke(app, ["evaluate", "--registry", str(registry), "--labels", "x.csv"])
    assert result.exit_code == 2 and "--labels and --segments go together" in result.output
