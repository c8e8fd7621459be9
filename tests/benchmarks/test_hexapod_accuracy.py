"""The hexapod accuracy benchmark's parts (python -m benchmarks.hexapod_accuracy) on a horizon of a few seconds.

The benchmark prints the figures; these tests check that it reads the truth right, that its centre-of-mass
propagation is the first-order formula, and that a short real run gives finite, consistent judgements.
"""

from __future__ import annotations

import numpy as np
import pytest

from benchmarks import hexapod_accuracy as bench
from shadow.monitoring import nominal_baseline
from simulators.live import FeedSettings


@pytest.fixture(scope="module")
def description():
    return bench.example_hexapod()


@pytest.fixture(scope="module")
def short_stream(description):
    windows = bench.held_fixture_windows(
        description, np.random.default_rng(20261202), n_windows=2, window_s=3.0, effects=FeedSettings().effects
    )
    return bench.play(windows)


def test_the_example_is_the_hexapod_and_its_fixture_is_the_truth(description, short_stream) -> None:
    assert description.family == "hexapod"
    truth = bench.constant_truth(short_stream.windows)
    # the example declares a 3.5 kg fixture with its centre of mass at (10, 0, 60) mm (shadow/examples/)
    assert truth[0] == pytest.approx(3.5)
    assert truth[1:4] / truth[0] == pytest.approx([0.010, 0.0, 0.060])
    assert truth.shape == (10,)
    for w in short_stream.windows:
        assert len(bench.constant_spans(w)) == 1  # clamped throughout: one span over the whole window


def test_a_part_changing_stream_has_no_single_truth(description) -> None:
    windows = bench.part_change_windows(description, np.random.default_rng(7), n_windows=1, window_s=2.0)
    spans = bench.constant_spans(windows[0])
    assert len(spans) >= 2  # the part is clamped after the first move (0.6 s)
    # the example's fixture (3.5 kg) stays clamped; its 0.80 kg part comes and goes (shadow/examples/)
    assert {round(float(theta[0]), 9) for _, _, theta in spans} == {3.5, 4.3}
    with pytest.raises(ValueError, match="window 0: the true payload changes"):
        bench.constant_truth(windows)


def test_stream_seconds_leave_the_pauses_out(short_stream) -> None:
    s = short_stream
    assert s.stream_seconds(s.starts_s[0] - 1.0) == 0.0
    assert s.stream_seconds(s.starts_s[0] + 1.0) == pytest.approx(1.0)
    in_pause = s.starts_s[0] + s.durations_s[0] + 0.5 * FeedSettings().gap_s
    assert s.stream_seconds(in_pause) == pytest.approx(s.durations_s[0])
    assert s.stream_seconds(s.starts_s[1] + 0.5) == pytest.approx(s.durations_s[0] + 0.5)


def test_centre_of_mass_propagation_matches_finite_differences(rng) -> None:
    x = np.array([2.0, 0.02, -0.01, 0.12])
    A = rng.normal(size=(4, 4))
    P = 1e-4 * (A @ A.T + np.eye(4))
    c, cov = bench.centre_of_mass(x, P)
    assert c == pytest.approx([0.01, -0.005, 0.06])
    # Jacobian by central differences, then J P J^T (first-order propagation of uncertainty, from memory)
    h = 1e-6
    J = np.stack(
        [(bench.centre_of_mass(x + h * e, P)[0] - bench.centre_of_mass(x - h * e, P)[0]) / (2 * h) for e in np.eye(4)],
        axis=1,
    )
    np.testing.assert_allclose(cov, J @ P @ J.T, rtol=1e-6, atol=0.0)
    with pytest.raises(ValueError, match="payload mass: must be > 0"):
        bench.centre_of_mass(np.array([0.0, 0.0, 0.0, 0.0]), P)


def test_a_short_run_gives_finite_judgements_consistent_with_the_rows(description, short_stream) -> None:
    followed = bench.follow(description, nominal_baseline(description), short_stream)
    truth = bench.constant_truth(short_stream.windows)
    final = bench.judge(followed, short_stream, truth)
    assert 0.0 < final.stream_s <= short_stream.durations_s.sum()
    assert np.isfinite([final.mass_kg, final.mass_std_kg, final.mass_error, final.com_distance_m]).all()
    assert np.isfinite(final.com_m).all() and np.all(final.com_std_m > 0)
    assert final.mass_error == pytest.approx(final.mass_kg / 3.5 - 1.0)
    assert final.com_distance_m == pytest.approx(np.linalg.norm(final.com_m - truth[1:4] / truth[0]))
    # the judged mass is the filter's last mass row (value and std)
    last = [e for e in followed.results.estimates if e["parameter"] == "payload_m"][-1]
    assert final.mass_kg == pytest.approx(last["value"], rel=1e-12)
    assert final.mass_std_kg == pytest.approx(last["std"], rel=1e-12)
    early = bench.judge(followed, short_stream, truth, at_stream_s=1.5)
    assert early.stream_s <= 1.5 < final.stream_s
    with pytest.raises(ValueError, match="no estimate yet"):
        bench.judge(followed, short_stream, truth, at_stream_s=0.1)
    shares = bench.identifiable_share(followed.results)
    assert set(shares) == set(bench.PAYLOAD_ROWS)
    assert all(0.0 <= share <= 1.0 for share, _ in shares.values())
    corr = bench.strongest_correlations(followed, "payload_m_cx")
    assert len(corr) == 2 and all(-1.0 <= r <= 1.0 and name != "payload_m_cx" for name, r in corr)
