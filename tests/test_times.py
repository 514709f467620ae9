"""Times a person reads are UTC clock times with their age, never raw epoch seconds."""
from __future__ import annotations

import re

import pytest

from ops.cli import main
from ops.times import age, moment, utc
from retrain_kit import bootstrap, model_bytes

EPOCH = re.compile(r"\b1\d{9}(\.\d+)?\b")  # seconds since 1970, as 2001-2033 print


@pytest.mark.parametrize("seconds, shown", [(0, "0s"), (119, "119s"), (120, "2m"), (7199, "119m"), (7200, "2h 0m"),
                                            (3 * 86400 + 7300, "3d 2h"), (-5, "0s")],
                         ids=["zero", "under-two-minutes", "two-minutes", "under-two-hours", "two-hours", "days",
                              "clock-skew"])
def test_age(seconds, shown):
    assert age(seconds) == shown


def test_moment_reads_as_a_utc_time_and_an_age():
    assert moment("1800000000.5", now=1800000300.0) == "2027-01-15 08:00 UTC (4m ago)"
    assert moment(1800000600, now=1800000000) == "2027-01-15 08:10 UTC (in 10m)"
    assert moment(None) == moment("") == moment("junk") == moment(0) == "-"
    assert utc(1800000000) == "2027-01-15 08:00:00 UTC"


@pytest.mark.redis_server
def test_models_list_and_show_print_times_not_epoch_seconds(redis_server, redis_client, capsys):
    registry, first = bootstrap(redis_client)
    registry.push(model_bytes(1))
    assert main(["models", "list", "--redis", redis_server.url]) == 0
    listing = capsys.readouterr().out
    assert "TRAINED" in listing and "LAST PROMOTED" in listing
    assert listing.count(" UTC (") == 3 and not EPOCH.search(listing)  # two trained, one promoted
    assert main(["models", "show", first, "--redis", redis_server.url]) == 0
    shown = capsys.readouterr().out
    assert re.search(r"^promoted_at: \d{4}-\d\d-\d\d \d\d:\d\d UTC \(\d+s ago\)$", shown, re.M)
    assert not EPOCH.search(shown)
    assert main(["models", "show", first, "--redis", redis_server.url, "--json"]) == 0
    assert EPOCH.search(capsys.readouterr().out)  # scripts keep the numbers


def test_a_busy_retrain_says_since_when_in_utc(fake_redis):
    from ops.retrain import RetrainBusy, RetrainLock
    from worker.settings import Keys

    with RetrainLock(client=fake_redis, keys=Keys(), ttl_s=60):
        with pytest.raises(RetrainBusy, match=r"lock held by .*:\d{4}-\d\d-\d\dT\d\d:\d\d:\d\dZ, expires in") as busy:
            with RetrainLock(client=fake_redis, keys=Keys(), ttl_s=60):
                pass
    assert not EPOCH.search(str(busy.value))
