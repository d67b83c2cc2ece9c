"""Tests of condition-aware PCA: labels, condition means aligned to onsets, axes fitted on a
window, and the drawing of long trajectories (window, thinning, title)."""

from __future__ import annotations

import numpy as np
import pytest
import torch

import hiddenlens as hl
from hiddenlens._analyses.pca import MAX_CONDITIONS, pca_analysis, pca_trajectories
from hiddenlens._core.trace import Trace


def _trace(states):
    states = np.asarray(states)
    B, T, S = states.shape
    return Trace(states, np.zeros((B, S)), np.zeros((B, T, 0)), {"state": slice(0, S)}, {})


def _correlated(B=9, T=40, S=6, seed=0):
    gen = np.random.default_rng(seed)
    mix = gen.normal(size=(S, S)) * np.linspace(2.0, 0.2, S)
    drift = np.linspace(0, 3, T)[None, :, None] * gen.normal(size=S)  # steps differ
    return _trace(gen.normal(size=(B, T, S)) @ mix.T + drift)


@pytest.fixture
def agg():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    yield plt
    plt.close("all")


# ---------------------------------------------------------------------- fit window
@pytest.mark.parametrize("how", ["slice", "steps mask", "state mask", "list"])
def test_axes_fitted_on_a_window_equal_scikit_learn_on_those_rows(how):
    from sklearn.decomposition import PCA

    tr = _correlated()
    B, T, S = tr.states.shape
    t = np.arange(T)
    onsets = np.arange(B) % 5 + 3
    chosen = {"slice": (slice(10, 30), np.broadcast_to((t >= 10) & (t < 30), (B, T))),
              "steps mask": ((t % 3 == 0), np.broadcast_to(t % 3 == 0, (B, T))),
              "state mask": (((t >= onsets[:, None]) & (t < onsets[:, None] + 12)),) * 2,
              "list": ([2, 5, 7, 20], np.broadcast_to(np.isin(t, [2, 5, 7, 20]), (B, T)))}
    fit_steps, mask = chosen[how]
    res = pca_trajectories(tr, k=3, fit_steps=fit_steps)
    X = tr.states.reshape(B * T, S)
    # reference library: scikit-learn's PCA fitted on exactly the chosen rows
    ref = PCA(n_components=3, svd_solver="full").fit(X[np.asarray(mask).reshape(-1)])
    np.testing.assert_array_equal(res.fit_mask, mask)
    np.testing.assert_allclose(res.explained_variance, ref.explained_variance_, rtol=1e-8)
    np.testing.assert_allclose(res.mean, ref.mean_, atol=1e-10)
    signs = np.sign(np.sum(res.components * ref.components_, axis=1))  # axes up to sign
    np.testing.assert_allclose(res.components, signs[:, None] * ref.components_, atol=1e-7)
    # every state, not only the window, is projected into those axes
    np.testing.assert_allclose(res.projected,
                               (ref.transform(X) * signs).reshape(B, T, 3), atol=1e-7)
    assert res.fit_description != "all steps" and res.fit_description in repr(res)
    # the captured share of all states' variance (numpy: projected variance / total)
    Xc = X - X.mean(0)
    want = np.sum((Xc @ res.components.T) ** 2) / np.sum(Xc**2)
    assert res.variance_captured == pytest.approx(want, rel=1e-10)


def test_without_a_window_the_captured_share_is_the_explained_share():
    res = pca_trajectories(_correlated(), k=2)
    assert res.fit_description == "all steps" and res.fit_mask.all()
    assert res.variance_captured == pytest.approx(res.explained_variance_ratio.sum(), rel=1e-9)


# ---------------------------------------------------------------------- condition means
def test_condition_means_per_sequence_equal_a_numpy_groupby_mean():
    tr = _correlated()
    labels = np.array(["a", "b", "c"] * 3)
    res = pca_trajectories(tr, k=3, labels=labels)
    assert res.label_kind == "categorical" and res.condition_names == ("a", "b", "c")
    np.testing.assert_array_equal(res.condition_steps, np.arange(40))
    for i, c in enumerate("abc"):
        # reference: numpy mean over the sequences of each label, step by step
        np.testing.assert_allclose(res.condition_means[i], res.projected[labels == c].mean(0),
                                   atol=1e-12)
        assert (res.condition_counts[i] == 3).all()


def test_condition_means_aligned_to_onsets_equal_a_numpy_groupby_mean():
    tr = _correlated()
    B, T, _ = tr.states.shape
    labels = np.array([0, 1, 2, 0, 1, 2, 0, 1, 1])
    onsets = np.array([3, 5, 8, 4, 5, 6, 8, 3, 4])
    res = pca_trajectories(tr, k=2, labels=labels, onsets=onsets)
    np.testing.assert_array_equal(res.condition_steps, np.arange(-8, T - 3))
    P = res.projected
    for i, c in enumerate([0, 1, 2]):
        for j, r in enumerate(res.condition_steps):
            # reference: numpy mean of the states r steps after each onset, per label
            rows = [P[b, onsets[b] + r] for b in range(B)
                    if labels[b] == c and 0 <= onsets[b] + r < T]
            assert res.condition_counts[i, j] == len(rows)
            if rows:
                np.testing.assert_allclose(res.condition_means[i, j], np.mean(rows, axis=0),
                                           atol=1e-12)
            else:
                assert np.isnan(res.condition_means[i, j]).all()
    df = res.to_frame(conditions=True)
    assert df.index.names == ["condition", "step"] and list(df.columns) == ["PC1", "PC2", "n"]
    np.testing.assert_allclose(df.loc[("1", 0), ["PC1", "PC2"]].to_numpy(dtype=float),
                               res.condition_means[1, 8])


def test_per_step_labels_with_unlabelled_steps():
    import pandas as pd

    tr = _correlated(B=4, T=30)
    gen = np.random.default_rng(2)
    labels = gen.choice([0.5, 1.5, 2.5, np.nan], size=(4, 30))
    res = pca_trajectories(tr, k=2, labels=labels)
    assert res.label_kind == "ordered"
    np.testing.assert_array_equal(res.conditions, [0.5, 1.5, 2.5])
    # reference library: a pandas groupby over (label, step); NaN labels drop out
    b, t = np.meshgrid(np.arange(4), np.arange(30), indexing="ij")
    df = pd.DataFrame({"label": labels.ravel(), "step": t.ravel(),
                       "pc1": res.projected[..., 0].ravel()}).dropna()
    want = df.groupby(["label", "step"])["pc1"].mean()
    for (lab, step), v in want.items():
        i = int(np.searchsorted(res.conditions, lab))
        assert res.condition_means[i, step, 0] == pytest.approx(v, abs=1e-12)
    assert res.condition_counts.sum() == len(df)


@pytest.mark.parametrize(("labels", "kind"), [
    (np.arange(9) % 3, "categorical"),
    (np.arange(9), "ordered"),  # more than 8 distinct integers
    (np.linspace(0, 1, 9), "ordered"),
    (np.arange(9) % 2 == 0, "categorical"),
])
def test_label_kind_auto(labels, kind):
    assert pca_trajectories(_correlated(), labels=labels).label_kind == kind
    assert pca_trajectories(_correlated(), labels=labels,
                            label_kind="categorical").label_kind == "categorical"


def test_too_many_values_give_no_means_but_still_colour():
    tr = _correlated(B=4, T=30)
    labels = np.arange(120, dtype=float).reshape(4, 30)
    assert 120 > MAX_CONDITIONS
    res = pca_trajectories(tr, labels=labels)
    assert res.condition_means is None and res.label_kind == "ordered"
    with pytest.raises(ValueError, match="no condition means"):
        res.to_frame(conditions=True)


@pytest.mark.parametrize(("kwargs", "match"), [
    ({"labels": [1, 2]}, r"labels must have shape \(9,\), one per sequence, or \(9, 40\)"),
    ({"labels": list("abcabcabc"), "label_kind": "ordered"}, "needs numeric labels"),
    ({"labels": [np.inf] * 9}, "Inf"),
    ({"label_kind": "nominal"}, "label_kind"),
    ({"onsets": [0] * 8}, r"one integer step per sequence, shape \(9,\)"),
    ({"onsets": [40] * 9}, "from 0 to 39"),
    ({"fit_steps": slice(50, 60)}, "selects none of the 40 steps"),
    ({"fit_steps": np.ones(7, bool)}, r"mask must have shape \(40,\) or \(9, 40\)"),
    ({"fit_steps": "delay"}, "fit_steps must be a slice"),
    ({"fit_steps": np.eye(9, 40, dtype=bool) & (np.arange(9) == 0)[:, None]},
     "selects 1 recorded state.*at least two"),
])
def test_bad_label_and_window_options_fail_clearly(kwargs, match):
    with pytest.raises(ValueError, match=match):
        pca_trajectories(_correlated(), **kwargs)


# ---------------------------------------------------------------------- drawing
def _texts(ax):
    legend = ax.get_legend()
    return [t.get_text() for t in legend.get_texts()] if legend else []


def test_plot_draws_condition_means_by_default(agg):
    tr = _correlated()
    labels = np.array(["red", "green", "yellow"] * 3)
    res = pca_trajectories(tr, labels=labels, onsets=np.arange(9) % 4 + 2,
                           fit_steps=slice(5, 25))
    ax = res.plot()
    assert len(ax.get_lines()) == 3  # one mean per condition, not nine trajectories
    assert {"red", "green", "yellow", "start", "end", "onset"} <= set(_texts(ax))
    styles = {line.get_linestyle() for line in ax.get_lines()}
    assert len(styles) == 3  # a line style per category besides its colour
    title = ax.get_title()
    assert "means of 3 conditions" in title and "from the onset" in title
    assert "axes fitted on steps 5 to 24" in title
    # a window relative to the onset, and single samples behind the means
    ax = res.plot(steps=slice(-2, 10), samples=[0, 4])
    assert "steps -2 to 9 from the onset" in ax.get_title()
    assert len(ax.collections) > 0
    # the trials instead, coloured by label with a legend
    ax = res.plot(conditions=False)
    assert "9 trajectories" in ax.get_title() and "green" in _texts(ax)


def test_ordered_labels_get_a_colour_bar(agg):
    res = pca_trajectories(_correlated(), labels=np.linspace(0, 1, 9))
    fig, ax = agg.subplots()
    res.plot(ax, conditions=False)
    assert len(fig.axes) == 2  # the data and the colour bar
    fig, ax = agg.subplots()
    res.plot(ax)  # the means, on the same colour map
    assert len(fig.axes) == 2 and fig.axes[1].get_ylabel().startswith("label")


def test_long_trajectories_are_thinned_and_the_title_says_so(agg):
    gen = np.random.default_rng(0)
    res = pca_trajectories(_trace(np.cumsum(gen.normal(size=(3, 1200, 4)), axis=1)))
    ax = res.plot()
    assert "every 3rd step" in ax.get_title() and "steps 0 to 1197" in ax.get_title()
    ax = res.plot(steps=slice(100, 300))
    assert "steps 100 to 299" in ax.get_title() and "every" not in ax.get_title()
    assert "every 5th step" in res.plot(thin=5).get_title()
    assert "sample 2" in _texts(res.plot(color_by="sample"))


def test_plot_options_fail_clearly(agg):
    res = pca_trajectories(_correlated())
    with pytest.raises(ValueError, match="no condition means; pass labels="):
        res.plot(conditions=True)
    with pytest.raises(ValueError, match="color_by='label' needs labels"):
        res.plot(color_by="label")
    with pytest.raises(ValueError, match="thin must be an int >= 1"):
        res.plot(thin=0)
    with pytest.raises(ValueError, match="selects none of the steps"):
        res.plot(steps=slice(100, 200))
    with pytest.raises(ValueError, match=r"\(9, 40\) \(one per step\)"):
        res.plot(color_by="colour")


# ---------------------------------------------------------------------- faces
def test_run_analyses_passes_task_targets_as_labels():
    torch.manual_seed(0)
    net = torch.nn.GRU(2, 5, batch_first=True)
    gen = np.random.default_rng(0)
    x = gen.normal(size=(6, 20, 2)).astype(np.float32)
    y, t0 = np.array([0, 1, 0, 1, 0, 1]), np.array([2, 3, 4, 2, 3, 4])
    out = hl.run_analyses(net, x, which=["pca"], context={"targets": y, "onsets": t0})
    res = out["pca"]
    np.testing.assert_array_equal(res.labels, y)
    np.testing.assert_array_equal(res.onsets, t0)
    assert res.condition_means.shape == (2, 22, 3)
    from hiddenlens._core.registry import analysis_spec

    spec = analysis_spec("pca")
    captions = [d.caption for d in spec.drawings(res, {})]
    assert captions == ["condition means", "single trials by label", "variance"]
    assert "mean trajectories of 2 conditions" in spec.setting({"run": res})
    # targets of other trials: recorded with their own inputs, or left out with a note
    trials = gen.normal(size=(4, 12, 2)).astype(np.float32)
    out = hl.run_analyses(net, x, which=["pca"], context={"targets": y[:4]},
                          options={"pca": {"inputs": trials}})
    assert out["pca"].projected.shape[:2] == (4, 12) and out["pca"].conditions.size == 2
    tr = hl.record(net, x)
    plain = pca_analysis(None, tr, targets=y[:4])
    assert plain.labels is None and "do not fit" in plain.metadata["labels_note"]


def test_widget_draws_condition_means_by_default():
    pytest.importorskip("ipywidgets")
    from hiddenlens.examples.sorting_line import SortingLineNet, make_inputs

    net = SortingLineNet("gru", 6, seed=0).eval()
    view = hl.explore(net, make_inputs(4, 30, seed=0), analyses=["pca"],
                      labels=["red", "green", "red", "green"], background=False)
    control = view._panels["pca"].views["color_by"]
    assert control.value == "means"
    means = view.images["pca"]
    control.value = "label"
    assert view.images["pca"] != means
    control.value = "time"
    assert view.images["pca"] not in (means, b"")


def test_fit_window_as_range_is_the_same_slice():
    # A range of steps (hashable, as a widget's choice) fits on the same states as the slice.
    tr = _correlated()
    a = pca_trajectories(tr, k=3, fit_steps=slice(10, 30))
    b = pca_trajectories(tr, k=3, fit_steps=range(10, 30))
    np.testing.assert_array_equal(a.fit_mask, b.fit_mask)
    np.testing.assert_allclose(a.projected, b.projected, atol=1e-12)
    assert b.fit_description == "steps 10 to 29"
