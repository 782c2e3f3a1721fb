"""Typed records built from decoded messages: fields and arrays land where they belong, missing ones fail."""

import numpy as np
import pytest

from shotpair.daemon.protocol import decode_data, decode_reply, encode_data, encode_reply
from shotpair.daemon.records import PointRecord, StatusRecord, to_record
from shotpair.drivers.errors import ProtocolError


def test_point_record_from_the_wire():
    a = np.linspace(-1e-3, 2e-3, 8)
    frames = encode_data("point", 7, "scan-1", 1.0, {"sweep": 1, "index": 3, "delay_ps": 0.5, "points_done": 12,
                                                      "points_total": 20, "future_field": "kept"},
                         {"delta_od": a, "delta_od_error": a / 10, "noise_floor": a / 20, "combined_delta_od": a,
                          "combined_delta_od_error": a / 14})
    rec = to_record(decode_data(frames))
    assert isinstance(rec, PointRecord)
    assert (rec.scan_id, rec.sweep, rec.index, rec.delay_ps, rec.points_total) == ("scan-1", 1, 3, 0.5, 20)
    np.testing.assert_array_equal(rec.noise_floor, a / 20)
    assert rec.header["future_field"] == "kept"  # unknown fields are kept, not lost


def test_status_reply_record_and_missing_fields():
    reply = decode_reply(encode_reply(1, state="acquiring", scan_id="s", points_done=3, points_total=10, eta_s=None))
    rec = to_record(reply)
    assert isinstance(rec, StatusRecord) and rec.state == "acquiring" and rec.eta_s is None and rec.sweep is None
    with pytest.raises(ProtocolError, match="no 'index'"):
        to_record(decode_data(encode_data("point", 0, "s", 0.0, {"sweep": 0})))
