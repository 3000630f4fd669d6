"""Fuzzing the whole ingest path: any bytes, any format -> a stored trace or a TracegenError, and a
failed ingest leaves the catalog byte-for-byte as it was."""

from __future__ import annotations

import tempfile
from pathlib import Path

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from conftest import SIMPLE_CSV, snapshot
from tracegen import TracegenError
from tracegen.catalog import Catalog

SUFFIX = {"csv": ".csv", "rtcp": ".jsonl", "ping": ".ping", "packets": ".pkts"}

# line-shaped noise close to each format, so the fuzzer gets past the first check often
NEAR = {
    "csv": st.lists(st.sampled_from(["t_s,bandwidth_bps", "0,1", "1,2", "1,-1", "2,x", "3,", "a;b", "\t"]),
                    max_size=8),
    "rtcp": st.lists(st.sampled_from(['{"arrival_s": 1}', '{"arrival_s": 2, "lsr": 1, "dlsr": 5}', "[]", "{",
                                      '{"arrival_s": 0.5, "jitter": 9}', '{"arrival_s": 3, "fraction_lost": 7}',
                                      "null", '"x"']), max_size=6),
    "ping": st.lists(st.sampled_from(["PING h (192.0.2.1) 56(84) bytes of data.",
                                      "64 bytes from 192.0.2.1: icmp_seq=1 ttl=64 time=1.0 ms",
                                      "64 bytes from 192.0.2.1: icmp_seq=3 ttl=64 time=2.5 ms",
                                      "64 bytes from 192.0.2.1: icmp_seq=2 ttl=64 time=0.000 ms",
                                      "--- h ping statistics ---", "3 packets transmitted, 2 received",
                                      "garbage"]), max_size=8),
    "packets": st.lists(st.sampled_from(["t,bytes", "0,100", "0.5,1500", "0.2,10", "1 20", "x,1", "2,-3"]),
                        max_size=8),
}


@pytest.mark.parametrize("fmt", sorted(SUFFIX))
@settings(max_examples=60, deadline=None)
@given(data=st.data())
def test_any_input_is_stored_or_refused_cleanly(fmt, data):
    lines = data.draw(NEAR[fmt])
    blob = data.draw(st.one_of(st.just("\n".join(lines).encode()), st.binary(max_size=200)))
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp) / "cat"
        cat = Catalog.open(root, create=True)
        seed = Path(tmp) / "seed.csv"
        seed.write_text(SIMPLE_CSV)
        cat.ingest([seed], "csv")
        before = snapshot(root)
        path = Path(tmp) / f"fuzz{SUFFIX[fmt]}"
        path.write_bytes(blob)
        try:
            report = cat.ingest([path], fmt)
        except TracegenError:
            assert snapshot(root) == before
        else:
            assert len(cat) == 1 + len(report.added)
            assert cat.verify().ok
