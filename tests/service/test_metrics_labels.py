"""Calls without a token cannot grow the server: metrics label values come from a closed
set (the service's own methods and one "unknown" bucket)."""

from __future__ import annotations

import re
import secrets
import urllib.request
from collections.abc import Callable

import grpc
import pytest

from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import Harness

_CALLS = 2_000


def _scrape(harness: Harness) -> str:
    assert harness.server is not None
    url = f"http://127.0.0.1:{harness.server.metrics_port}/metrics"
    with urllib.request.urlopen(url, timeout=30) as response:
        return response.read().decode()


def test_random_method_names_without_a_token_land_in_one_bucket(
    harness_factory: Callable[..., Harness],
) -> None:
    harness = harness_factory(metrics_listen="127.0.0.1:0")
    before = len(_scrape(harness))
    with harness.channel() as channel:
        for number in range(_CALLS):
            # Unknown methods of known and unknown services, as a scanner would send them.
            service = "PoolService" if number % 2 else f"S{secrets.token_hex(4)}"
            call = channel.unary_unary(f"/leadline.v1.{service}/M{secrets.token_hex(8)}")
            with pytest.raises(grpc.RpcError) as refused:
                call(b"", timeout=10)
            assert refused.value.code() == grpc.StatusCode.UNAUTHENTICATED
        with harness.stubs() as stubs:
            stubs.call(stubs.pools.ListPools, pb.ListPoolsRequest())
    body = _scrape(harness)
    methods = set(re.findall(r'leadline_requests_total\{method="([^"]*)"', body))
    # Before, each random name made its own series: 2,000 series and a page 1000x larger.
    assert methods == {"unknown", "ListPools"}
    assert f'leadline_requests_total{{method="unknown",code="UNAUTHENTICATED"}} {_CALLS}' in body
    assert len(body) < before + 10_000
