"""Sequence bookkeeping at the edges: reordering around the first message, huge jumps."""

from __future__ import annotations

from labwatch.sequence import SequenceTracker


def test_message_reordered_before_the_first_one_seen_is_late_not_duplicate():
    t = SequenceTracker()
    assert t.check("s", "r", 23) == "first"
    assert t.counters.missed_at_start == 23
    assert t.check("s", "r", 22) == "late"  # held back by the source, sent after 23
    assert t.counters.missed_at_start == 22 and t.counters.late == 1
    assert t.check("s", "r", 22) == "duplicate"  # a second copy is a copy
    assert t.counters.duplicates == 1 and t.counters.missed_at_start == 22


def test_far_older_messages_than_the_reorder_window_stay_duplicates():
    t = SequenceTracker(reorder_window=8)
    assert t.check("s", "r", 100) == "first"
    assert t.check("s", "r", 50) == "duplicate"
    assert t.counters.missed_at_start == 100


def test_unseen_after_last_counts_only_trailing_losses():
    t = SequenceTracker()
    for s in (0, 1, 5):  # 2, 3, 4 already counted missing
        t.check("s", "r", s)
    assert t.counters.missing == 3
    assert t.unseen_after_last("s", "r", 9) == 4  # 6, 7, 8, 9
    assert t.unseen_after_last("s", "other", 9) == 0
