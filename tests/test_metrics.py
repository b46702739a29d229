"""Calibration (expected calibration error, reliability curve) and pose consistency."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.calibration import calibration_curve

from shapes.errors import InputError
from shapes.metrics import expected_calibration_error, pose_consistency, reliability_curve

# Six predictions over three classes, worked by hand with 5 bins (0, .2], (.2, .4], (.4, .6], (.6, .8], (.8, 1]:
#   row  probs             target  pred  conf  right  bin
#   0    .90 .05 .05       0       0     .90   yes    (.8, 1]
#   1    .10 .85 .05       2       1     .85   no     (.8, 1]
#   2    .60 .30 .10       0       0     .60   yes    (.4, .6]   (on an edge: the bin below)
#   3    .20 .50 .30       1       1     .50   yes    (.4, .6]
#   4    .45 .10 .45       2       0     .45   no     (.4, .6]   (a tie: the first class)
#   5    .70 .20 .10       1       0     .70   no     (.6, .8]
# (.8, 1]:  n 2, conf (.90 + .85) / 2 = .875, acc 1/2,  |gap| .375,     weight 2/6 -> .125
# (.4, .6]: n 3, conf (.60 + .50 + .45) / 3 = .51667, acc 2/3, |gap| .15, weight 3/6 -> .075
# (.6, .8]: n 1, conf .70, acc 0, |gap| .70,                            weight 1/6 -> .11667
# ECE = .125 + .075 + .11667 = 19/60 = 0.31667
# source: Guo et al. 2017, "On calibration of modern neural networks", eq. (3), bins I_m = ((m-1)/M, m/M]
PROBS = np.array([
    [0.90, 0.05, 0.05],
    [0.10, 0.85, 0.05],
    [0.60, 0.30, 0.10],
    [0.20, 0.50, 0.30],
    [0.45, 0.10, 0.45],
    [0.70, 0.20, 0.10],
])
TARGET = np.array([0, 2, 0, 1, 2, 1])


def test_ece_hand_worked_example():
    assert expected_calibration_error(PROBS, TARGET, bins=5) == pytest.approx(19 / 60, abs=1e-12)
    curve = reliability_curve(PROBS, TARGET, bins=5)
    np.testing.assert_array_equal(curve.count, [0, 0, 3, 1, 2])
    np.testing.assert_allclose(curve.confidence[2:], [1.55 / 3, 0.70, 0.875], atol=1e-12)
    np.testing.assert_allclose(curve.accuracy[2:], [2 / 3, 0.0, 0.5], atol=1e-12)
    assert np.isnan(curve.confidence[:2]).all() and np.isnan(curve.accuracy[:2]).all()  # empty bins
    np.testing.assert_array_equal(curve.edges, [0.0, 0.2, 0.4, 0.6, 0.8, 1.0])
    assert curve.total == 6


def test_ece_zero_for_perfect_calibration_and_not_otherwise():
    # four predictions at confidence .75 of which three are right, two at .5 of which one is right:
    # acc equals conf in every bin, so ECE is 0 (Guo et al. 2017: perfectly calibrated)
    probs = np.array([[0.75, 0.25]] * 4 + [[0.5, 0.5]] * 2)
    assert expected_calibration_error(probs, np.array([0, 0, 0, 1, 0, 1])) == pytest.approx(0.0, abs=1e-15)
    # both ways: the same confidences with one right answer in four are overconfident by .5 on 4 of 6
    assert expected_calibration_error(probs, np.array([0, 1, 1, 1, 0, 1])) == pytest.approx(0.5 * 4 / 6, abs=1e-12)
    # a large sample drawn calibrated (right with probability = confidence) scores near 0 ...
    gen = np.random.default_rng(0)
    c = gen.uniform(0.5, 1.0, 200_000)
    probs = np.stack([c, 1.0 - c], 1)
    calibrated = np.where(gen.uniform(size=c.size) < c, 0, 1)
    assert expected_calibration_error(probs, calibrated, bins=10) < 0.01  # common practice: sampling error ~ 1/sqrt(M per bin)
    # ... and one right with probability c^2 is overconfident by E[c - c^2] = 1/6 on U(0.5, 1) (by integration)
    over = np.where(gen.uniform(size=c.size) < c * c, 0, 1)
    assert expected_calibration_error(probs, over, bins=10) == pytest.approx(1 / 6, abs=0.01)


def test_ece_bin_edge_cases():
    # one bin: ECE = |overall accuracy - mean confidence| = |3/6 - (.9 + .85 + .6 + .5 + .45 + .7) / 6| = |.5 - 4/6|
    assert expected_calibration_error(PROBS, TARGET, bins=1) == pytest.approx(abs(0.5 - 4.0 / 6.0), abs=1e-12)
    # confidence 1 goes in the last bin; a confidence on an edge in the bin below it
    curve = reliability_curve(np.array([[1.0, 0.0], [0.5, 0.5], [0.6, 0.4], [0.6000001, 0.3999999]]), np.array([0, 0, 0, 0]), bins=5)
    np.testing.assert_array_equal(curve.count, [0, 0, 2, 1, 1])
    # more bins than predictions: empty bins do not count
    assert expected_calibration_error(PROBS, TARGET, bins=1000) == pytest.approx(
        (abs(1 - 0.9) + abs(0 - 0.85) + abs(1 - 0.6) + abs(1 - 0.5) + abs(0 - 0.45) + abs(0 - 0.7)) / 6, abs=1e-12
    )
    # rows whose sums are off by round-off (float32 softmax: ~1e-7) are accepted
    assert expected_calibration_error(PROBS + np.array([0.0, 3e-7, 0.0]), TARGET, bins=5) == pytest.approx(19 / 60, abs=1e-6)


def test_reliability_curve_matches_scikit_learn():
    gen = np.random.default_rng(3)
    logits = gen.normal(size=(500, 4)) * 2.0
    probs = np.exp(logits) / np.exp(logits).sum(1, keepdims=True)
    target = gen.integers(0, 4, 500)
    curve = reliability_curve(probs, target, bins=10)
    conf, right = probs.max(1), (probs.argmax(1) == target).astype(int)
    # reference: sklearn.calibration.calibration_curve (uniform bins, non-empty bins only) on
    # (right answer, confidence); no confidence lies on an edge here, where float edges may differ
    acc, mean_conf = calibration_curve(right, conf, n_bins=10, strategy="uniform")
    full = curve.count > 0
    np.testing.assert_allclose(curve.accuracy[full], acc, atol=1e-12)
    np.testing.assert_allclose(curve.confidence[full], mean_conf, atol=1e-12)
    ece = (curve.count[full] * np.abs(acc - mean_conf)).sum() / 500
    assert expected_calibration_error(probs, target) == pytest.approx(ece, abs=1e-12)


def test_pose_consistency_hand_worked():
    votes = np.array([[1, 1, 1], [2, 2, 0], [3, 3, 3], [0, 1, 2]])
    # hand-worked from the definition in pose_consistency's docstring (the share of parts with one answer
    # under every pose): rows 0 and 2 agree across the three poses, 2 of 4
    assert pose_consistency(votes) == 0.5
    assert pose_consistency(np.array([["nut", "nut"], ["nut", "washer"], ["gear", "gear"]])) == pytest.approx(2 / 3)
    assert pose_consistency(np.zeros((5, 8), dtype=int)) == 1.0
    # both ways: one changed vote in one pose breaks that part's consistency
    changed = votes.copy()
    changed[0, 2] = 9
    assert pose_consistency(changed) == 0.25


def test_metrics_reject_bad_input():
    with pytest.raises(InputError, match=r"probs should have shape \(M, C\).*got \(6,\)"):
        expected_calibration_error(PROBS[:, 0], TARGET)
    with pytest.raises(InputError, match="sum to 1.*not logits"):
        expected_calibration_error(PROBS * 0.9, TARGET)
    with pytest.raises(InputError, match=r"in \[0, 1\]"):
        expected_calibration_error(np.array([[1.5, -0.5]]), np.array([0]))
    with pytest.raises(InputError, match="target should be 6 integer labels, got shape \\(5,\\)"):
        expected_calibration_error(PROBS, TARGET[:5])
    with pytest.raises(InputError, match=r"0\.\.2, got values in 0\.\.3"):
        expected_calibration_error(PROBS, np.array([0, 1, 2, 3, 0, 0]))
    with pytest.raises(InputError, match="bins should be a positive int, got 0"):
        reliability_curve(PROBS, TARGET, bins=0)
    with pytest.raises(InputError, match=r"K >= 2 poses, got \(4, 1\)"):
        pose_consistency(np.zeros((4, 1), dtype=int))
    with pytest.raises(InputError, match="labels"):
        pose_consistency(np.zeros((4, 3)))
