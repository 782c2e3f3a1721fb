"""`shotpair status`'s human text: a scan paused by an instrument fault says which instrument and what to do."""

from shotpair.daemon.remote import describe_status


def test_fault_pause_names_the_instrument_and_the_way_out():
    st = {"state": "paused", "scan_id": "s1", "points_total": 10, "sweeps": 1, "points": 10, "point": 3,
          "points_done": 2, "fault": {"instrument": "detector", "error": "no reply within 6.5 s", "time": 0.0}}
    text = describe_status(st)
    assert "FAULT of detector: no reply within 6.5 s" in text and "shotpair resume" in text


def test_a_pause_the_user_asked_for_shows_no_fault():
    st = {"state": "paused", "scan_id": "s1", "points_total": 10, "sweeps": 1, "points": 10, "fault": None}
    assert "FAULT" not in describe_status(st)
