"""The alert state machine on hand-written sequences; each expected transition list is worked
out by hand from the rules in runtime/alerts.py (warm-up, min_hops, hysteresis, cooldown)."""

import json

import pytest

from ganlet.runtime.alerts import AlertMachine


def machine(**settings):
    """An alert machine with neutral settings (no warm-up, one hop opens, close below 0.8 x
    the threshold, no cooldown) except those given."""
    return AlertMachine(**{"warmup_hops": 0, "min_hops": 1, "close_ratio": 0.8,
                           "cooldown_hops": 0, **settings})


def run(machine, scores, threshold=1.0):
    return [machine.step(s, threshold) for s in scores]


def test_warmup_blocks_opening_and_reports_once():
    m = machine(warmup_hops=3)
    # hops 0-2 are warm-up (high scores ignored); hop 2 completes it; hop 3 opens
    assert run(m, [5.0, 5.0, 5.0, 5.0, 5.0]) == [None, None, "warmed_up", "opened", None]
    assert m.open_since_hop == 3 and m.hop == 5 and m.is_warm
    # no warm-up: no "warmed_up" transition at all
    assert run(machine(), [0.1, 0.1]) == [None, None]


def test_min_hops_needs_consecutive_exceedances_and_starts_at_first():
    m = machine(min_hops=3)
    seq = [2.0, 2.0, 0.5, 2.0, 3.0, 2.5, 2.0]
    #      run 1, 2, broken; run 1, 2, 3 -> open at hop 5 with start hop 3; still open
    assert run(m, seq) == [None, None, None, None, None, "opened", None]
    assert m.is_open and m.open_since_hop == 3
    assert m.peak_score == 3.0  # the peak includes the hops before the opening


def test_hysteresis_separate_open_and_close_levels():
    m = machine(close_ratio=0.8)
    # threshold 1.0: opens above 1.0, closes only below 0.8
    seq = [0.9, 1.1, 0.9, 0.85, 0.8, 1.4, 0.79, 0.95, 0.99]
    exp = [None, "opened", None, None, None, None, "closed", None, None]
    assert run(m, seq) == exp
    assert not m.is_open
    assert m.open_since_hop == 1 and m.peak_score == 1.4  # describe the alert just closed


def test_cooldown_blocks_reopening():
    m = machine(cooldown_hops=2)
    seq = [2.0, 0.1, 2.0, 2.0, 2.0, 0.1, 2.0]
    # open hop 0, close hop 1, hops 2-3 cooldown (ignored), hop 4 opens; close 5; 6 cooldown
    exp = ["opened", "closed", None, None, "opened", "closed", None]
    assert run(m, seq) == exp
    assert m.open_since_hop == 4


def test_cooldown_hops_do_not_count_towards_min_hops():
    m = machine(min_hops=2, cooldown_hops=1)
    seq = [2.0, 2.0, 0.1, 2.0, 2.0, 2.0]
    # open at hop 1 (start 0), close hop 2, hop 3 cooldown, hops 4-5 form a new run -> open at 5
    assert run(m, seq) == [None, "opened", "closed", None, None, "opened"]
    assert m.open_since_hop == 4


def test_an_off_delay_closes_only_after_that_many_quiet_hops_in_a_row():
    m = machine(min_hops=1)
    seq = [2.0, 0.1, 2.0, 0.1, 0.1, 2.0, 0.1, 0.1, 0.1, 2.0]
    # open hop 0; one quiet hop (1) and a loud one (2) restart the count; 3-4 quiet, 5 loud;
    # 6-8 three quiet in a row: closed at 8, the third; 9 opens again (no cooldown)
    assert [m.step(s, 1.0, off_hops=3) for s in seq] == [
        "opened", None, None, None, None, None, None, None, "closed", "opened"]
    restored = AlertMachine.from_state(json.loads(json.dumps(m.state())))
    assert restored.state() == m.state()
    # a state from before the off-delay counts no quiet hop
    old = {k: v for k, v in m.state().items() if k != "quiet"}
    assert AlertMachine.from_state(old).state() == m.state()


def test_nan_neither_opens_nor_closes():
    m = machine(min_hops=2)
    nan = float("nan")
    assert run(m, [2.0, nan, 2.0, 2.0, nan, 0.1]) == [None, None, None, "opened", None, "closed"]


def test_threshold_is_read_per_hop():
    m = machine()
    assert m.step(1.5, 2.0) is None  # below this hop's threshold
    assert m.step(1.5, 1.0) == "opened"  # the same score above a lower threshold
    assert m.step(1.5, 2.0) == "closed"  # 1.5 < 0.8 * 2.0


def test_state_round_trip():
    seq = [0.5, 2.0, 2.0, 0.9, 3.0, 0.1, 2.0, 2.0, 2.0, 0.5, 0.1, 2.0, 2.0, 2.5, 0.7, 0.2]
    for off_hops in (1, 2):
        for cut in range(len(seq)):
            m = machine(warmup_hops=1, min_hops=2, close_ratio=0.5, cooldown_hops=2)
            [m.step(s, 1.0, off_hops) for s in seq[:cut]]
            restored = AlertMachine.from_state(json.loads(json.dumps(m.state())))
            assert restored.state() == m.state()
            rest = seq[cut:]
            assert [restored.step(s, 1.0, off_hops) for s in rest] == [
                m.step(s, 1.0, off_hops) for s in rest]
            assert restored.state() == m.state()


def test_full_sequence_expected_transitions():
    m = machine(warmup_hops=1, min_hops=2, close_ratio=0.5, cooldown_hops=2)
    seq = [0.5, 2.0, 2.0, 0.9, 3.0, 0.1, 2.0, 2.0, 2.0, 0.5, 0.1, 2.0, 2.0, 2.5, 0.7, 0.2]
    # hop 0 warm-up done; 1-2 run -> open at 2 (start 1); 3: 0.9 >= 0.5 stays open; 4 peak 3.0;
    # 5 closes; 6-7 cooldown; 8 run 1; 9 breaks; 10 below; 11-12 run -> open at 12 (start 11);
    # 13 peak 2.5; 14: 0.7 >= 0.5 open; 15 closes
    exp = [
        "warmed_up",
        None,
        "opened",
        None,
        None,
        "closed",
        None,
        None,
        None,
        None,
        None,
        None,
        "opened",
        None,
        None,
        "closed",
    ]
    assert run(m, seq) == exp
    assert (m.open_since_hop, m.peak_score, m.hop) == (11, 2.5, 16)


@pytest.mark.parametrize(
    "kwargs", [{"min_hops": 0}, {"warmup_hops": -1}, {"close_ratio": 1.5}, {"cooldown_hops": 1.5}]
)
def test_rejects_bad_settings(kwargs):
    with pytest.raises(ValueError):
        machine(**kwargs)
