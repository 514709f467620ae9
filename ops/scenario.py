"""The demo's invented world: a neighbourhood forum, its comments, and a spam wave.

Everything here is made up.  *Hedgerow Lane* (``hedgerow-lane.example``) is a
neighbourhood gardening-and-cycling forum with four sections (the ``site``
field of a comment): ``allotments``, ``cycling``, ``swap-shop`` and
``events``.  Its members write ordinary comments; a trickle of background
spam of the kinds every site sees (work-from-home money, pills, search
ranking, coin doubling) arrives all day.  Partway through the stream a
coordinated campaign starts: many fresh accounts post near-duplicate
testimonials for an invented soil additive, *Quorbex* capsules, sold from
``quorbex-soil.invalid``.  Its brand words never occur in the training set,
so the first model has never seen them.

The generator is deterministic for a seed: every random choice comes from a
:class:`random.Random` seeded with a string derived from the seed and the
part being generated (string seeds are hashed with SHA-512 by ``random``, so
the result does not depend on ``PYTHONHASHSEED``).

Two entry points:

* :meth:`Scenario.training_set` -- labelled comments (ham and background
  spam, no wave) for the first model;
* :meth:`Scenario.stream` -- the timed stream on an accelerated clock: each
  :class:`ScenarioComment` carries its scenario timestamp ``ts`` (epoch
  seconds) and its true label, and the wave occupies
  ``[wave_start_s, wave_end_s)`` seconds after ``start_ts``.
"""
from __future__ import annotations

import math
import random
import re
from collections.abc import Iterator
from dataclasses import dataclass

DOMAIN = "hedgerow-lane.example"
SITES = ("allotments", "cycling", "swap-shop", "events")

# The campaign's own words: none of them occurs in any training comment.
WAVE_TERMS = ("quorbex", "quorbex-soil.invalid", "rootlacing", "mycoburst")
WAVE_SITES = ("allotments", "swap-shop")


@dataclass(frozen=True)
class ScenarioComment:
    """One invented comment, with the truth the demo scores against.

    ``kind`` is ``ham``, ``spam`` (background spam) or ``wave`` (the
    campaign); ``label`` is 1 for spam of either kind.
    """

    id: str
    text: str
    site: str
    author: str
    ts: float
    label: int
    kind: str

    def fields(self) -> dict[str, str]:
        """The input-stream entry a site would XADD for this comment."""
        return {"id": self.id, "text": self.text, "site": self.site, "author": self.author, "ts": f"{self.ts:.3f}"}


# --- the forum's members and their ordinary comments -----------------------

_FIRST = (
    "Ailsa", "Bram", "Cressida", "Dov", "Edda", "Fintan", "Gully", "Hesper", "Ivo", "Juno", "Kester", "Linnet",
    "Morwen", "Nyle", "Oriel", "Perrin", "Quill", "Rosalind", "Sorrel", "Tamsin", "Ulric", "Verity", "Wren",
    "Xanthe", "Yarrow", "Zeb", "Anouk", "Bede", "Clem", "Delphine",
)
_HANDLE_TAIL = (
    "_grows", "_rides", "onwheels", "_plot14", "_plot7", "_lane", "_beans", "_spokes", "_compost", "_veg",
    "", "_h", "_b", "_kitchen", "_pedals",
)

_CROPS = (
    "tomatoes", "runner beans", "courgettes", "leeks", "broad beans", "garlic", "potatoes", "kale",
    "raspberries", "onions", "beetroot", "squash", "sweet peas", "strawberries", "chard", "parsnips",
)
_PESTS = ("slugs", "aphids", "blackfly", "pigeons", "cabbage whites", "carrot fly", "vine weevils", "mice")
_WEATHER = ("the frost", "last week's rain", "the heatwave", "that hailstorm", "the dry spell", "the wind on Tuesday")
_METHODS = (
    "beer traps", "copper tape", "netting", "companion planting with marigolds", "a garlic spray",
    "wool pellets", "crushed eggshells", "nematodes", "mulching with straw", "fleece at night",
)
_ROUTES = (
    "canal towpath", "ring road cycle lane", "old railway path", "bridge by the mill", "hill up to the reservoir",
    "cut-through behind the library", "riverside loop", "contraflow on Cooper Street",
)
_ROUTE_STATES = (
    "flooded", "covered in glass", "resurfaced at last", "blocked by the roadworks", "full of potholes",
    "really icy in the mornings", "much better since the new lights", "muddy but rideable",
)
_BIKE_BITS = (
    "a puncture kit", "brake pads", "a chain tool", "panniers", "lights", "a child seat", "mudguards", "a pump",
)
_ITEMS = (
    "seed potatoes", "a wheelbarrow", "spare canes", "a water butt", "rhubarb crowns", "a kids' bike",
    "terracotta pots", "a cold frame", "strawberry runners", "a garden fork", "a folding bike", "tomato seedlings",
    "an old greenhouse", "a bike trailer", "a box of jam jars", "raspberry canes",
)
_ITEM_STATES = (
    "in good nick", "needs a bit of love", "barely used", "free to a good home", "a bit rusty but works",
    "still in the packet",
)
_STREETS = (
    "Orchard Row", "Cooper Street", "Mill Lane", "Beacon Close", "Tanner's Yard", "Church Walk", "Elm Terrace",
)
_EVENTS = (
    "seed swap", "bike maintenance workshop", "litter pick", "harvest supper", "group ride", "plant sale",
    "composting talk", "repair cafe", "apple pressing day", "pond clearing morning",
)
_DAYS = ("Saturday", "Sunday", "next Wednesday", "the 14th", "Friday evening", "the first weekend of the month")
_VENUES = ("the community hall", "plot 3", "the scout hut", "the cafe by the bridge", "the library garden")

_HAM_TEMPLATES = {
    "allotments": (
        "Has anyone tried {method} for {pest}? They went through my {crop} again after {weather}.",
        "My {crop} did really well this year, I think {method} helped more than anything.",
        "Lost most of the {crop} to {pest} after {weather}. Going to try {method} next season.",
        "Does anyone know when it is safe to plant out {crop} round here? Worried about {weather} coming back.",
        "{name}, I had the same problem with {pest} on my {crop}. {method} sorted it within a fortnight.",
        "The water trough by plot 9 is leaking again, could someone on the committee have a look?",
        "Thanks for the tip about {method}, {name}. My {crop} look so much healthier now.",
        "First {crop} of the year today! Small but tasty. The {pest} left us a few for once.",
        "Anyone got spare {crop} seedlings? Mine all damped off after {weather}.",
        "Reminder that the compost bays are for plot holders only, someone dumped builders' rubble in bay 2.",
    ),
    "cycling": (
        "Heads up, the {route} is {state} this week.",
        "Is the {route} {state}? Thinking of taking the kids along it on {day}.",
        "Rode the {route} this morning and it was {state}. Take care out there.",
        "Can anyone recommend somewhere local to buy {bits}? The shop on {street} closed.",
        "{name}, thanks for lending me {bits} at the weekend, saved my commute.",
        "Someone left {bits} by the bike racks at {venue}, I have handed it in at the desk.",
        "The council survey about the {route} closes on {day}, worth filling in if you ride it.",
        "Got a puncture on the {route} again. It must be the hedge cutting, thorns everywhere.",
        "Who is up for a slow social ride along the {route} on {day}? Coffee after at {venue}.",
        "Map of the new route is on https://{domain}/routes if anyone wants it.",
    ),
    "swap-shop": (
        "Giving away {item}, {istate}. Collect from {street}.",
        "Looking for {item} if anyone has one spare, happy to swap for {crop} seedlings.",
        "Still got {item}, {istate}, going to the tip on {day} if nobody wants it.",
        "{name}, is the {item} still available? I can pick up this evening.",
        "Swapped my {item} for a bag of {crop} with {name}. This board is brilliant.",
        "Free: {item} and some {crop} plants, {istate}. Message me.",
        "Has anyone got {bits} they no longer need? My lad has just started riding to school.",
        "The {item} has gone now, thanks all.",
    ),
    "events": (
        "Reminder: the {event} is on {day} at {venue}.",
        "Great turnout at the {event} yesterday, thanks to everyone who came along.",
        "Can we move the {event} to {day}? Half the plot holders are away.",
        "Does anyone need a lift to the {event} at {venue}? I have two seats.",
        "Photos from the {event} are up on https://{domain}/events now.",
        "Volunteers needed for the {event} on {day}, even an hour helps.",
        "{name}, will there be tea at the {event}? Happy to bring a cake.",
        "The {event} is cancelled this week because of {weather}, sorry everyone.",
    ),
}

# --- background spam the first model learns ---------------------------------

_SPAM_TEMPLATES = (
    "Earn ${money} a week from home, no experience needed! Start today at http://{spamhost}/join",
    "Make ${money} per day with this one simple trick, click http://{spamhost} now",
    "CHEAP {pill} without prescription, discreet worldwide shipping, order at http://{spamhost}",
    "Buy {pill} online lowest price guaranteed, 80% off today only http://{spamhost}/shop",
    "Get your website to page one! Best SEO backlinks, {money} links for $5 http://{spamhost}",
    "Double your bitcoin in 24 hours GUARANTEED, send now and receive 2x http://{spamhost}/btc",
    "Crypto investment platform paying {money}% monthly returns, join free http://{spamhost}",
    "Congratulations you have won a ${money} gift card! Claim your prize at http://{spamhost}/claim",
    "Hot singles in your area want to meet you tonight http://{spamhost}",
    "Need a loan fast? Bad credit OK, instant approval up to ${money} http://{spamhost}/apply",
    "Work from home and earn {money} dollars weekly, limited places, register at http://{spamhost}",
    "Lose 20 pounds in 10 days with our miracle diet pills, order now http://{spamhost}",
)
_PILLS = ("viagra", "cialis", "tramadol", "xanax", "diet pills", "painkillers")
_SPAM_HOSTS = (
    "fastcash-now.invalid", "pharma-deals.invalid", "rank-boost.invalid", "coin-double.invalid",
    "prize-centre.invalid", "quickloan-24.invalid", "meet-tonight.invalid", "slim-fast-pills.invalid",
)

# --- the wave: one campaign, near-duplicates, new vocabulary ----------------

_WAVE_TEMPLATE = (
    "{open} I started dropping {count} Quorbex capsules in the watering can every week and my {crop} "
    "doubled in size in under a fortnight. The rootlacing formula with mycoburst spores does what compost "
    "and manure never could. Limited stock left for local growers at quorbex-soil.invalid/{code}"
)
_WAVE_OPENERS = ("Fellow growers,", "Honest review:", "Not an ad, just sharing:", "Can't keep this to myself.", "Hi all,")
_WAVE_HANDLE_PARTS = ("green", "happy", "urban", "super", "real", "lucky", "daily", "true")
_WAVE_HANDLE_NOUNS = ("grower", "gardener", "planter", "harvest", "sprout", "digger")


def _params_table():
    # (name, check, expectation) for every constructor parameter
    return (
        ("seed", lambda v: isinstance(v, int) and not isinstance(v, bool), "an integer"),
        ("start_ts", lambda v: isinstance(v, (int, float)) and v >= 0, "epoch seconds >= 0"),
        ("duration_s", lambda v: isinstance(v, (int, float)) and v > 0, "seconds > 0"),
        ("rate_per_min", lambda v: isinstance(v, (int, float)) and v > 0, "comments per minute > 0"),
        ("spam_share", lambda v: isinstance(v, (int, float)) and 0 <= v < 1, "a share in [0, 1)"),
        ("wave_start_s", lambda v: isinstance(v, (int, float)) and v >= 0, "seconds >= 0"),
        ("wave_end_s", lambda v: isinstance(v, (int, float)) and v >= 0, "seconds >= 0"),
        ("wave_rate_per_min", lambda v: isinstance(v, (int, float)) and v >= 0, "comments per minute >= 0"),
        ("wave_accounts", lambda v: isinstance(v, int) and not isinstance(v, bool) and v >= 1, "an integer >= 1"),
    )


class Scenario:
    """The Hedgerow Lane forum over one accelerated stretch of time.

    Parameters
    ----------
    seed : every random choice derives from it; same seed, same comments.
    start_ts : scenario epoch seconds where the stream starts (the default is
        a midnight UTC, so a 03:00 UTC nightly retrain falls inside the
        default four hours).
    duration_s : length of the stream in scenario seconds.
    rate_per_min : ordinary traffic (ham and background spam), per minute.
    spam_share : share of the ordinary traffic that is background spam.
    wave_start_s, wave_end_s : the campaign runs in this window, in seconds
        after ``start_ts``.
    wave_rate_per_min : extra campaign comments per minute inside the window.
    wave_accounts : invented accounts the campaign posts from.
    """

    def __init__(
        self,
        *,
        seed: int = 7,
        start_ts: float = 1_799_971_200.0,
        duration_s: float = 4 * 3600.0,
        rate_per_min: float = 60.0,
        spam_share: float = 0.04,
        wave_start_s: float = 90 * 60.0,
        wave_end_s: float = 4 * 3600.0,
        wave_rate_per_min: float = 12.0,
        wave_accounts: int = 300,
    ):
        self.seed = seed
        self.start_ts = start_ts
        self.duration_s = duration_s
        self.rate_per_min = rate_per_min
        self.spam_share = spam_share
        self.wave_start_s = wave_start_s
        self.wave_end_s = wave_end_s
        self.wave_rate_per_min = wave_rate_per_min
        self.wave_accounts = wave_accounts
        self._check()

    def _check(self) -> None:
        for name, ok, expected in _params_table():
            value = getattr(self, name)
            if not ok(value):
                raise ValueError(f"Scenario: {name} must be {expected}, got {value!r}")
        if self.wave_end_s < self.wave_start_s:
            raise ValueError(f"Scenario: wave_end_s must be >= wave_start_s, got {self.wave_end_s!r}")

    def _rng(self, part: str) -> random.Random:
        return random.Random(f"hedgerow-lane:{self.seed}:{part}")

    # -- members -----------------------------------------------------------

    def members(self) -> list[str]:
        """The forum's regular members' handles (stable for a seed)."""
        rng = self._rng("members")
        handles = sorted({(f + rng.choice(_HANDLE_TAIL)).lower() for f in _FIRST for _ in range(3)})
        return handles

    def wave_handles(self) -> list[str]:
        """The campaign's invented accounts, all fresh (no overlap with members)."""
        rng = self._rng("wave-accounts")
        out: list[str] = []
        seen: set[str] = set()
        while len(out) < self.wave_accounts:
            h = f"{rng.choice(_WAVE_HANDLE_PARTS)}{rng.choice(_WAVE_HANDLE_NOUNS)}{rng.randrange(100, 10_000)}"
            if h not in seen:
                seen.add(h)
                out.append(h)
        return out

    # -- single comments ---------------------------------------------------

    def ham_text(self, rng: random.Random, site: str, members: list[str]) -> str:
        template = rng.choice(_HAM_TEMPLATES[site])
        name = rng.choice(members).split("_")[0].capitalize()
        return template.format(
            method=rng.choice(_METHODS), pest=rng.choice(_PESTS), crop=rng.choice(_CROPS),
            weather=rng.choice(_WEATHER), route=rng.choice(_ROUTES), state=rng.choice(_ROUTE_STATES),
            bits=rng.choice(_BIKE_BITS), item=rng.choice(_ITEMS), istate=rng.choice(_ITEM_STATES),
            street=rng.choice(_STREETS), event=rng.choice(_EVENTS), day=rng.choice(_DAYS),
            venue=rng.choice(_VENUES), name=name, domain=DOMAIN,
        )

    def spam_text(self, rng: random.Random) -> str:
        return rng.choice(_SPAM_TEMPLATES).format(
            money=rng.choice(("500", "1000", "250", "3000", "90", "40")),
            pill=rng.choice(_PILLS), spamhost=rng.choice(_SPAM_HOSTS),
        )

    def wave_text(self, rng: random.Random) -> str:
        """One campaign comment: a template with a few slots, so members are near-duplicates."""
        return _WAVE_TEMPLATE.format(
            open=rng.choice(_WAVE_OPENERS), count=rng.choice(("two", "three")), crop=rng.choice(_CROPS[:4]),
            code=rng.randrange(1000, 10000),
        )

    # -- the two entry points ----------------------------------------------

    def training_set(self, n: int = 3000) -> list[ScenarioComment]:
        """``n`` labelled comments from before the stream: ham and background spam, no wave.

        The background spam share is raised to a quarter so the first model
        sees enough of it; the timestamps precede ``start_ts``.
        """
        if not isinstance(n, int) or isinstance(n, bool) or n < 10:
            raise ValueError(f"Scenario.training_set: n must be an integer >= 10, got {n!r}")
        rng = self._rng("training")
        members = self.members()
        out = []
        for i in range(n):
            site = rng.choice(SITES)
            ts = self.start_ts - 86_400.0 + i * (86_400.0 / n)
            if rng.random() < 0.25:
                out.append(ScenarioComment(f"hl-t{i:06d}", self.spam_text(rng), site, self._spam_author(rng), ts, 1, "spam"))
            else:
                out.append(ScenarioComment(f"hl-t{i:06d}", self.ham_text(rng, site, members), site, rng.choice(members), ts, 0, "ham"))
        return out

    def stream(self) -> Iterator[ScenarioComment]:
        """The timed stream, in timestamp order.

        Ordinary traffic is a Poisson process at ``rate_per_min``; inside the
        wave window the campaign adds its own Poisson process at
        ``wave_rate_per_min``, posting to :data:`WAVE_SITES`.
        """
        rng = self._rng("stream")
        wave_rng = self._rng("wave")
        members = self.members()
        handles = self.wave_handles()
        end = self.start_ts + self.duration_s
        w0, w1 = self.start_ts + self.wave_start_s, self.start_ts + min(self.wave_end_s, self.duration_s)

        next_ordinary = self.start_ts + rng.expovariate(self.rate_per_min / 60.0)
        next_wave = w0 + wave_rng.expovariate(self.wave_rate_per_min / 60.0) if self.wave_rate_per_min > 0 else math.inf
        n = 0
        while True:
            if next_wave >= w1:
                next_wave = math.inf
            ts = min(next_ordinary, next_wave)
            if ts >= end:
                return
            n += 1
            cid = f"hl-{n:07d}"
            if ts == next_wave:
                site = wave_rng.choice(WAVE_SITES)
                yield ScenarioComment(cid, self.wave_text(wave_rng), site, wave_rng.choice(handles), ts, 1, "wave")
                next_wave = ts + wave_rng.expovariate(self.wave_rate_per_min / 60.0)
                continue
            site = rng.choice(SITES)
            if rng.random() < self.spam_share:
                yield ScenarioComment(cid, self.spam_text(rng), site, self._spam_author(rng), ts, 1, "spam")
            else:
                yield ScenarioComment(cid, self.ham_text(rng, site, members), site, rng.choice(members), ts, 0, "ham")
            next_ordinary = ts + rng.expovariate(self.rate_per_min / 60.0)

    def _spam_author(self, rng: random.Random) -> str:
        return f"user{rng.randrange(10_000, 99_999)}"


def words(text: str) -> set[str]:
    """Lower-cased words and dotted host names of ``text`` (for vocabulary checks)."""
    return set(re.findall(r"[a-z0-9][a-z0-9.\-']*[a-z0-9]|[a-z0-9]", text.lower()))
