"""`seawall demo`: the story's key claims hold on the real code path.

One embedded run (fakeredis, as `seawall demo` does by default) is shared by
the tests of this module: the command runs end to end and a spy keeps the
DemoResult it computed, so the claims are checked on the figures the summary
and the report were made from.  One more run plays the story on a real
redis-server (`--redis`).
"""
from __future__ import annotations

import html.parser
import re

import pytest

from model.calibration import Thresholds
import ops.lab.demo as demo_module  # `seawall demo` imports run_demo from here when it runs
from ops.cli import main
from ops.lab.scenario import WAVE_SITES

@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """Run `seawall demo --report PATH` once; keep its output, its report and its DemoResult."""
    report = tmp_path_factory.mktemp("demo") / "report.html"
    results = []
    real_run_demo = demo_module.run_demo

    def spy(**kwargs):
        result = real_run_demo(**kwargs)
        results.append((result, kwargs))
        return result

    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(demo_module, "run_demo", spy)
        mp.delenv("SEAWALL_CONFIG", raising=False)
        code = main(["demo", "--report", str(report)])
    (result, kwargs), = results
    return {"code": code, "report": report, "result": result, "client": kwargs["client"],
            "config": kwargs["config"]}


def test_the_command_succeeds_and_writes_the_report(demo):
    assert demo["code"] == 0
    assert demo["report"].stat().st_size > 10_000


def test_the_wave_is_detected_by_the_campaign_and_the_wave_detector(demo):
    result = demo["result"]
    start = result.wave_start_ts
    campaigns = [e for e in result.events if e["type"] == "campaign_start"]
    waves = [e for e in result.events if e["type"] == "wave_start"]
    # no false alarm on the ordinary traffic before the wave
    assert campaigns and all(e["ts"] >= start for e in campaigns)
    assert waves and all(e["data"]["minute"] * 60 >= start - 60 for e in waves)
    # the first campaign is the wave itself, found within its 10-minute window
    first = campaigns[0]
    assert result.first_event("campaign_start") is first
    assert re.fullmatch(r"hl-\d+", first["data"]["example_id"])
    delays = result.figures()["detection_delay_s"]
    assert delays["campaign_start"] is not None and delays["campaign_start"] <= 600
    assert delays["wave_start"] is not None and delays["wave_start"] <= 900
    assert {e["data"]["site"] for e in waves} & set(WAVE_SITES)


def test_recall_on_the_wave_rises_after_the_retrain(demo):
    result = demo["result"]
    assert result.retrain_report["decision"] == "promoted"
    assert result.retrained_model and result.retrained_model != result.first_model
    figures = result.figures()
    before, after = figures["before"], figures["after"]
    assert before["wave"] > 100 and after["wave"] > 100
    # the first model is blind to the wave: only the campaign policy holds it
    assert before["wave_model_recall"] < 0.1
    assert after["wave_model_recall"] > 0.9
    # the campaign detector may already hold the whole wave before the retrain; the model takes over after it
    assert after["wave_recall"] >= before["wave_recall"]
    assert after["wave_recall"] > 0.95


def test_ordinary_comments_are_rarely_flagged(demo):
    figures = demo["result"].figures()
    for phase in ("before", "after"):
        assert figures[phase]["false_positive_rate"] < 0.06, phase
        assert figures[phase]["ham_rejected"] < 0.005, phase
        assert figures[phase]["spam_recall"] > 0.9, phase


def test_every_comment_got_one_verdict_and_nothing_is_left_pending(demo):
    result, client, config = demo["result"], demo["client"], demo["config"]
    streamed = sum(1 for _ in result.scenario.stream())
    assert len(result.verdicts) == streamed
    assert len({v.comment.id for v in result.verdicts}) == streamed
    summary = client.xpending(config.keys.comments, config.keys.group)
    assert summary["pending"] == 0


def test_both_workers_scored_and_hot_reloaded_the_promoted_model(demo):
    result = demo["result"]
    assert all(n > 0 for n in result.batches.values()) and len(result.batches) == 2
    after = [v for v in result.verdicts if v.comment.ts >= result.retrain_ts + 60]
    assert after and {v.model for v in after} == {result.retrained_model}


def test_moderators_labels_reached_the_retrain(demo):
    result = demo["result"]
    sent_before_retrain = result.retrain_report["labels"]["new"]
    assert sent_before_retrain >= 100
    assert sum(result.labels_sent.values()) >= sent_before_retrain
    assert result.retrain_report["labels"]["moderators"]


def test_the_workers_metrics_agree_with_the_verdicts(demo):
    result = demo["result"]
    metrics = result.metrics
    counted = {k.split("=")[1].rstrip("}"): v for k, v in metrics.items() if k.startswith("seawall_comments_total")}
    actions = result.figures()["actions"]
    assert counted == {a: float(n) for a, n in actions.items()}
    assert metrics["seawall_retrain_runs_total{outcome=promoted}"] == 1.0
    assert any(k.startswith("seawall_wave_active") for k in metrics)


class _Tags(html.parser.HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags: list[str] = []
        self.refs: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        for name, value in attrs:
            if name in {"src", "href"} and value:
                self.refs.append(value)


def test_report_is_one_self_contained_page_with_the_plots(demo):
    text = demo["report"].read_text(encoding="utf-8")
    parser = _Tags()
    parser.feed(text)
    assert "script" not in parser.tags and "link" not in parser.tags and "img" not in parser.tags
    assert parser.refs == []
    assert parser.tags.count("svg") == 4
    # the only URL is the SVG namespace name, which browsers never fetch
    assert set(re.findall(r"https?://[^\"'\s<]+", text)) == {"http://www.w3.org/2000/svg"}
    figures = demo["result"].figures()
    assert f"{100 * figures['after']['wave_recall']:.1f}%" in text
    assert "Flagged rate over time" in text and "Score distribution" in text and "Before and after" in text


@pytest.mark.redis_server
def test_demo_on_a_real_server_refuses_a_used_prefix_then_runs_with_reset(redis_server, tmp_path, capsys):
    client = redis_server.client()
    client.set("seawall-demo:leftover", "1")
    report = tmp_path / "r.html"
    assert main(["demo", "--redis", redis_server.url, "--report", str(report), "--quiet"]) == 2
    assert "--reset" in capsys.readouterr().err
    assert client.get("seawall-demo:leftover") == b"1"
    client.set("other:key", "kept")

    assert main(["demo", "--redis", redis_server.url, "--report", str(report), "--quiet", "--reset"]) == 0
    out = capsys.readouterr().out
    assert "wave recall" in out and "nightly retrain: promoted" in out
    assert report.is_file()
    assert client.get("seawall-demo:leftover") is None
    assert client.get("other:key") == b"kept"
    row = next(line for line in out.splitlines() if line.startswith("  by the model alone"))
    before, after = (float(x.rstrip("%")) for x in row.split()[-2:])
    assert before < 10.0 and after > 90.0


@pytest.mark.parametrize(
    "argv, message",
    [
        (["--report", "/nonexistent-folder/r.html"], "does not exist"),
        (["--prefix", ""], "--prefix must not be empty"),
    ],
    ids=["report-folder-missing", "empty-prefix"],
)
def test_bad_arguments_fail_before_anything_runs(argv, message, capsys):
    assert main(["demo", *argv]) == 2
    err = capsys.readouterr().err
    assert err.startswith("seawall demo: error: demo: ") and message in err


def test_report_of_a_refused_retrain_says_so_and_shows_no_after_figures():
    from ops.lab.demo import DemoResult, Verdict
    from ops.lab.demo_report import render_html, summary_text
    from ops.lab.scenario import Scenario

    scenario = Scenario(duration_s=300.0, wave_start_s=120.0, wave_end_s=300.0)
    comments = list(scenario.stream())
    result = DemoResult(scenario=scenario, first_model="m1", thresholds={"m1": Thresholds(hold=0.5, reject=0.9)},
                        retrain_report={"decision": "refused", "reasons": ["holdout too small"]})
    result.verdicts = [Verdict(c, "hold" if c.label else "publish", 0.7 if c.label else 0.1, "m1",
                               int((c.ts - scenario.start_ts) // 60)) for c in comments]
    text = summary_text(result, backend="test")
    assert "nightly retrain: refused" in text
    assert "n/a" in text  # nothing was scored by a retrained model
    page = render_html(result, backend="test")
    assert page.count("<svg") == 4 and "n/a" in page
