"""Token buckets against the closed form: tokens(t) = min(burst, tokens(t0) + rate (t - t0))."""

from __future__ import annotations

import pytest

from service.api.rate_limits import TokenBuckets


def test_bucket_spends_refills_and_says_how_long_to_wait() -> None:
    now = [0.0]
    buckets = TokenBuckets(rate=4.0, burst=2, clock=lambda: now[0])
    assert buckets.take("k") == 0.0 and buckets.take("k") == 0.0  # the burst of 2
    assert buckets.take("k") == pytest.approx(0.25)  # one token at 4 per second: 1/4 s
    now[0] = 0.125  # half a token has come back
    assert buckets.take("k") == pytest.approx(0.125)
    now[0] = 0.25
    assert buckets.take("k") == 0.0  # a whole token
    now[0] = 100.0  # long idle: never more than the burst
    assert [buckets.take("k") for _ in range(3)][:2] == [0.0, 0.0] and buckets.take("k") > 0
    assert buckets.take("other") == 0.0  # a bucket per key


def test_many_keys_keep_memory_bounded_and_forget_full_buckets_first() -> None:
    now = [0.0]
    buckets = TokenBuckets(rate=1.0, burst=5, max_keys=100, clock=lambda: now[0])
    for i in range(100):
        buckets.take(f"idle-{i}")
    now[0] = 10.0  # every bucket full again (5 tokens take 5 s)
    busy = [buckets.take("busy") for _ in range(6)]
    assert busy[:5] == [0.0] * 5 and busy[5] > 0
    assert len(buckets._buckets) <= 100
    assert buckets.take("busy") > 0  # the spent bucket was kept: forgetting it would reset the limit


def test_rate_and_burst_must_be_positive() -> None:
    with pytest.raises(ValueError, match="rate"):
        TokenBuckets(rate=0.0, burst=1)
    with pytest.raises(ValueError, match="burst"):
        TokenBuckets(rate=1.0, burst=0)
