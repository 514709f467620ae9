"""The demo's invented data: deterministic, timed, and with a wave the first model cannot know."""
from __future__ import annotations

import itertools

import pytest

from ops.lab.scenario import DOMAIN, SITES, WAVE_SITES, WAVE_TERMS, Scenario, words

SMALL = dict(duration_s=3600.0, wave_start_s=1200.0, wave_end_s=2400.0, rate_per_min=40.0, wave_rate_per_min=10.0)


def _shingles(text: str, k: int = 3) -> set[tuple[str, ...]]:
    toks = text.lower().split()
    return {tuple(toks[i : i + k]) for i in range(len(toks) - k + 1)}


def _jaccard(a: set, b: set) -> float:
    return len(a & b) / len(a | b)


def test_same_seed_gives_the_same_comments():
    one, two = Scenario(seed=11, **SMALL), Scenario(seed=11, **SMALL)
    assert one.training_set(500) == two.training_set(500)
    assert list(one.stream()) == list(two.stream())


def test_another_seed_gives_other_comments():
    one, two = Scenario(seed=11, **SMALL), Scenario(seed=12, **SMALL)
    assert [c.text for c in one.training_set(200)] != [c.text for c in two.training_set(200)]
    assert [c.text for c in itertools.islice(one.stream(), 200)] != [c.text for c in itertools.islice(two.stream(), 200)]


def test_wave_vocabulary_never_occurs_in_the_training_set():
    scenario = Scenario(seed=3, **SMALL)
    training_words = set().union(*(words(c.text) for c in scenario.training_set(3000)))
    wave = [c for c in scenario.stream() if c.kind == "wave"]
    assert len(wave) > 100
    for term in WAVE_TERMS:
        assert term not in training_words, term
    # every campaign comment carries the brand, and none of the ordinary ones does
    assert all("quorbex" in words(c.text) for c in wave)
    assert not any("quorbex" in c.text.lower() for c in scenario.stream() if c.kind != "wave")


def test_stream_is_timed_and_the_wave_stays_in_its_window():
    scenario = Scenario(seed=5, **SMALL)
    stream = list(scenario.stream())
    ts = [c.ts for c in stream]
    assert ts == sorted(ts)
    assert scenario.start_ts <= ts[0] and ts[-1] < scenario.start_ts + scenario.duration_s
    assert len({c.id for c in stream}) == len(stream)
    wave = [c for c in stream if c.kind == "wave"]
    assert all(scenario.start_ts + 1200.0 <= c.ts < scenario.start_ts + 2400.0 for c in wave)
    assert {c.site for c in wave} <= set(WAVE_SITES)
    assert {c.site for c in stream} == set(SITES)
    # Poisson traffic at 40 + 10 per minute: within 10% of the expected count (about 5 standard deviations)
    expected = 40.0 * 60 + 10.0 * 20
    assert abs(len(stream) - expected) < 0.1 * expected
    assert all(c.label == (c.kind != "ham") for c in stream)


def test_wave_is_a_campaign_of_near_duplicates_from_many_fresh_accounts():
    scenario = Scenario(seed=5, **SMALL)
    wave = [c for c in scenario.stream() if c.kind == "wave"]
    members = set(scenario.members())
    authors = {c.author for c in wave}
    assert len(authors) > 50 and not authors & members
    # a campaign, not a topic: most pairs share well over half their 3-word shingles
    sims = [_jaccard(_shingles(a.text), _shingles(b.text)) for a, b in zip(wave, wave[1:])]
    assert sorted(sims)[len(sims) // 2] > 0.6


def test_ham_links_point_at_the_forum_and_spam_links_at_invalid_hosts():
    scenario = Scenario(seed=5, **SMALL)
    comments = scenario.training_set(2000)
    assert any(DOMAIN in c.text for c in comments if c.kind == "ham")
    for c in comments:
        for w in words(c.text):
            if "." in w and w.rstrip(".").count(".") and "/" not in w and w.split(".")[-1].isalpha():
                assert w.endswith((".example", ".invalid")), (c.text, w)


def test_fields_are_the_input_stream_contract():
    comment = next(Scenario(seed=1, **SMALL).stream())
    fields = comment.fields()
    assert set(fields) == {"id", "text", "site", "author", "ts"}
    assert all(isinstance(v, str) for v in fields.values())
    assert float(fields["ts"]) == pytest.approx(comment.ts, abs=1e-3)


@pytest.mark.parametrize(
    "kwargs, field",
    [
        ({"duration_s": 0}, "duration_s"),
        ({"rate_per_min": -1.0}, "rate_per_min"),
        ({"spam_share": 1.0}, "spam_share"),
        ({"seed": "7"}, "seed"),
        ({"wave_accounts": 0}, "wave_accounts"),
        ({"wave_start_s": 100.0, "wave_end_s": 50.0}, "wave_end_s"),
    ],
    ids=["zero-duration", "negative-rate", "all-spam", "string-seed", "no-accounts", "wave-ends-before-it-starts"],
)
def test_bad_parameters_name_the_field(kwargs, field):
    with pytest.raises(ValueError, match=field):
        Scenario(**kwargs)


def test_training_set_size_is_checked():
    with pytest.raises(ValueError, match="n must be"):
        Scenario().training_set(3)


def test_ordinary_comments_do_not_look_like_a_campaign():
    # The campaign detector looks for near-duplicates within minutes; members'
    # comments on the same topic must rarely come that close to each other.
    scenario = Scenario(seed=5, **SMALL)
    ham = [_shingles(c.text) for c in scenario.stream() if c.kind == "ham"][:1500]
    close = total = 0
    for i, a in enumerate(ham):
        for b in ham[i + 1 : i + 60]:
            if a and b:
                total += 1
                close += _jaccard(a, b) >= 0.6
    assert close / total < 0.002, (close, total)
