"""Detection metrics and event matching against scikit-learn and worked examples."""

import numpy as np
import pytest
from sklearn.metrics import confusion_matrix, precision_recall_fscore_support

from ganlet.compile.evaluate import error_sites, event_metrics, point_metrics
from ganlet.compile.verify import alert_events, match_events


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_point_metrics_match_sklearn(seed):
    rng = np.random.default_rng(seed)
    y = rng.random(500) < 0.3
    p = np.where(rng.random(500) < 0.7, y, ~y)
    ours = point_metrics(y, p)
    # reference: sklearn.metrics.precision_recall_fscore_support (binary, positive = anomaly)
    prec, rec, f1, _ = precision_recall_fscore_support(y, p, average="binary", zero_division=0)
    assert ours["precision"] == pytest.approx(prec)
    assert ours["recall"] == pytest.approx(rec)
    assert ours["f1"] == pytest.approx(f1)
    # reference: sklearn.metrics.confusion_matrix -> FAR = FP/(FP+TN), MAR = FN/(FN+TP)
    tn, fp, fn, tp = confusion_matrix(y, p, labels=[False, True]).ravel()
    assert ours["far"] == pytest.approx(fp / (fp + tn))
    assert ours["mar"] == pytest.approx(fn / (fn + tp))


def test_point_metrics_no_predicted_positives_matches_sklearn_zero_division():
    y = np.array([0, 1, 1, 0], bool)
    p = np.zeros(4, bool)
    prec, rec, f1, _ = precision_recall_fscore_support(y, p, average="binary", zero_division=0)
    ours = point_metrics(y, p)  # reference: sklearn zero_division=0
    assert (ours["precision"], ours["recall"], ours["f1"]) == (prec, rec, f1)
    assert ours["mar"] == 1.0 and ours["far"] == 0.0


def test_event_metrics_worked_example():
    # worked example: 1 s grid, two incidents [10, 20) and [40, 45); alerts at 13..16 (delay
    # 3 s into the first), 60..62 (a false alarm) and none in the second incident.
    n = 86400  # one day of points, so false alarms per day equals the count
    times = np.datetime64("2026-01-01T00:00:00") + np.arange(n) * np.timedelta64(1, "s")
    y = np.zeros(n, bool)
    y[10:20] = True
    y[40:45] = True
    a = np.zeros(n, bool)
    a[13:17] = True
    a[60:63] = True
    m = event_metrics(times, y, a, 1.0)
    assert m["incidents"] == 2 and m["detected"] == 1
    assert m["event_recall"] == 0.5
    assert m["mean_delay_s"] == 3.0
    assert m["false_alarm_events"] == 1
    assert m["false_alarms_per_day"] == pytest.approx(1.0)


def test_alert_events_and_matching_worked_example():
    a = np.array([0, 1, 1, 0, 0, 0, 1, 1, 1, 0, 0, 0, 0, 0, 0, 1], bool)
    assert alert_events(a) == [(1, 3), (6, 9), (15, 16)]
    # worked example: b's events start at 2 (1 hop after a's first), 10 (4 after a's second)
    b_events = [(2, 4), (10, 12)]
    pairs, only_a, only_b = match_events(alert_events(a), b_events, tolerance=3)
    assert pairs == [(0, 0)]
    assert only_a == [1, 2] and only_b == [1]
    pairs, only_a, only_b = match_events(alert_events(a), b_events, tolerance=4)
    assert pairs == [(0, 0), (1, 1)] and only_a == [2] and only_b == []


def test_error_sites_worked_example_adds_up_to_the_confusion_matrix():
    # worked example, 30 rows: labels at 5..9 and 20..24; alerts at 3..7 (2 rows early), 9..12
    # (from the label's last row, 3 rows on), 15..16 (apart) and none in the second label.
    y = np.zeros(30, bool)
    y[5:10] = y[20:25] = True
    p = np.zeros(30, bool)
    p[3:8] = p[9:13] = p[15:17] = True
    sites = error_sites(y, p)
    assert sites == {"lead": 2, "tail": 3, "apart": 2, "onset": 0, "unseen": 5, "dropped": 1}
    # reference: sklearn.metrics.confusion_matrix; the sites split FP and FN exactly
    tn, fp, fn, tp = confusion_matrix(y, p, labels=[False, True]).ravel()
    assert sites["lead"] + sites["tail"] + sites["apart"] == fp
    assert sites["onset"] + sites["unseen"] + sites["dropped"] == fn


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_error_sites_split_random_alerts_exactly(seed):
    rng = np.random.default_rng(seed)
    y = np.repeat(rng.random(40) < 0.3, 10)  # runs of labelled rows
    p = np.repeat(rng.random(100) < 0.4, 4)
    sites = error_sites(y, p)
    tn, fp, fn, tp = confusion_matrix(y, p, labels=[False, True]).ravel()  # reference: sklearn
    assert sites["lead"] + sites["tail"] + sites["apart"] == fp
    assert sites["onset"] + sites["unseen"] + sites["dropped"] == fn
