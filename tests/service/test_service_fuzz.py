"""Fuzzing: hypothesis-generated and randomly mutated messages; only clean rejections, never a crash or hang.

The benchmark (isoclay.bench.service) runs the same harness with 100k+ messages; here the counts are small.
"""

from __future__ import annotations

import msgpack
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from isoclay import wire
from isoclay.bench.service import fuzz_decode, fuzz_server

KEY = bytes(range(32))

plain = st.recursive(
    st.none() | st.booleans() | st.integers(-2**63, 2**64 - 1) | st.floats(allow_nan=True, allow_subnormal=False) | st.text(max_size=20)
    | st.binary(max_size=20),
    lambda children: st.lists(children, max_size=4) | st.dictionaries(st.text(max_size=8), children, max_size=4),
    max_leaves=20)


def _decode_cleanly(frames) -> None:
    try:
        wire.decode(KEY, frames, wire.REQUESTS)
    except wire.WireError as exc:
        assert exc.code and "\n" not in str(exc)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.binary(max_size=80), max_size=6))
def test_arbitrary_frames_are_rejected_cleanly(frames):
    _decode_cleanly(frames)


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(header=st.dictionaries(st.sampled_from(["v", "type", "session", "seq", "t", "boot", "re", "body", "arrays", "x"]),
                              plain, max_size=10),
       arrays=st.lists(st.binary(max_size=48), max_size=3))
def test_signed_headers_of_any_shape_are_rejected_cleanly(header, arrays):
    # Signed with the right key, so every check behind the signature is exercised.
    raw = msgpack.packb(header, use_bin_type=True)
    _decode_cleanly([wire.sign(KEY, raw), raw, *arrays])


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(body=st.dictionaries(st.sampled_from(["job_id", "task", "params", "source_key", "parent_node", "mesh_hash"]),
                            plain, max_size=6),
       kind=st.sampled_from(sorted(wire.REQUESTS)))
def test_signed_bodies_of_any_shape_are_rejected_cleanly(body, kind):
    header = {"v": 1, "type": kind, "session": "s", "seq": 1, "t": __import__("time").time(), "boot": "", "re": 0,
              "body": body, "arrays": []}
    raw = msgpack.packb(header, use_bin_type=True)
    _decode_cleanly([wire.sign(KEY, raw), raw])


def test_random_mutation_of_valid_messages_never_crashes_the_decoder():
    out = fuzz_decode(3000, seed=11)
    assert out["crashes"] == 0
    assert out["rejected"] > 0.9 * out["messages"]
    assert out["known_good_after"]  # the harness cannot pass by rejecting everything


def test_mutated_messages_against_a_live_server(tmp_path):
    out = fuzz_server(600, seed=12, workdir=tmp_path)
    assert out["hangs"] == 0 and out["server_alive"] and out["internal_errors"] == 0
    assert out["known_good_after"]
