"""The demo's invented world: a neighbourhood forum, its comments, and a spam wave.

Everything here is made up.  *Hedgerow Lane* (``hedgerow-lane.example``) is a
neighbourhood gardening-and-cycling forum with four sections (the ``site``
field of a comment): ``allotments``, ``cycling``, ``swap-shop`` and
``events``.  Its members write ordinary comments; a trickle of background
spam of the kinds every site sees (work-from-home money, pills, search
ranking, coin doubling) arrives all day.  Partway through the stream a
coordinated campaign starts: many fresh accounts post near-duplicate
testimonials for an invented soil additive, *Quorbex* capsules.  The
comments carry no link (the campaign asks readers to search for the brand,
a common way around link filters), and the brand words never occur in the
training set, so the first model has nothing to go on.

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

from model.params import Rule, integer, set_params

DOMAIN = "hedgerow-lane.example"
_ALTERNATIVES = re.compile(r"\[([^\[\]]*)\]")
SITES = ("allotments", "cycling", "swap-shop", "events")

# The campaign's own words: none of them occurs in any training comment.
WAVE_TERMS = ("quorbex", "rootlacing", "mycoburst")
WAVE_SITES = ("allotments", "swap-shop")
# Share of ordinary comments that are members' own small promotions.
LOCAL_PROMO_SHARE = 0.06


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
_PRICES = ("£2", "£5", "£10", "£15", "£25", "£40", "50p", "a fiver")
_DAYS = ("Saturday", "Sunday", "next Wednesday", "the 14th", "Friday evening", "the first weekend of the month")
_VENUES = ("the community hall", "plot 3", "the scout hut", "the cafe by the bridge", "the library garden")

# "[a|b|c]" picks one phrasing at random: members say the same thing in
# different words.
_HAM_TEMPLATES = {
    "allotments": (
        "[Has anyone tried|Anyone had luck with|Is it worth trying] {method} for {pest}? They [went through|ruined|had] my {crop} [again after|straight after] {weather}.",
        "My {crop} [did really well|were brilliant|did better than ever] this year, I think {method} helped [more than anything|a lot].",
        "Lost [most of|half] the {crop} to {pest} after {weather}. Going to try {method} [next season|next year|from now on].",
        "[Does anyone know when it is safe to|When do people round here|Is it too early to] plant out {crop}? [Worried about|Scared of] {weather} coming back.",
        "{name}, I had the same problem with {pest} on my {crop}. {Method} sorted it [within a fortnight|in a week or so|eventually].",
        "The water trough by plot {n} is [leaking again|broken] after {weather}, could someone on the committee [have a look|sort it]?",
        "Thanks for the tip about {method}, {name}. My {crop} look [so much healthier now|miles better].",
        "First {crop} of the year [today|this morning]! [Small but tasty|Not bad at all]. The {pest} left us a few for once.",
        "Anyone got spare seedlings? My {crop} all [damped off|died] after {weather}.",
        "[Reminder that|Please remember] the compost bays are for plot holders only, someone dumped {item} in bay {n}.",
        "Free manure at the stables on {street}, {price} a bag delivered, {day} only.",
        "The shop on {street} has {pct}% off {crop} seed this week, worth stocking up before spring.",
        "Ordered {method} online for the {pest} and it arrived in {n} days. [Works a treat|Seems to work] on the {crop}.",
    ),
    "cycling": (
        "[Heads up|Watch out|FYI], the {route} is {state} again near {street}.",
        "Is the {route} {state}? Thinking of [taking the kids along it|riding it] on {day}.",
        "Rode the {route} [this morning|last night|at lunchtime] and it was {state}. [Take care out there|Be careful].",
        "Can anyone recommend somewhere [local|nearby] to buy {bits}? The shop on {street} closed.",
        "{name}, thanks for lending me {bits} [at the weekend|on {day}], saved my commute.",
        "Someone left {bits} by the bike racks at {venue}, I have handed [it|them] in at the desk.",
        "The council survey about the {route} closes on {day}, worth filling in if you [ride it|use it].",
        "Got a puncture on the {route} again on {day}. It must be the hedge cutting near {street}.",
        "Who is up for a [slow social|gentle] ride along the {route} on {day}? Coffee after at {venue}.",
        "Map of the new route along the {route} is on https://{domain}/routes/{code} if anyone wants it.",
        "Bike shop on {street} has {pct}% off {bits} this week, worth it before the clocks change.",
        "Did {n} miles on the {route} today, my best yet. [Route and photos|Details] at https://{domain}/rides/{code}",
    ),
    "swap-shop": (
        "Giving away {item}, {istate}. Collect from {street}.",
        "[Looking for|After|Does anyone have] {item}? [Happy to swap for|Can give you] some {crop} [in return|for it].",
        "Still got {item}, {istate}, going to the tip on {day} if nobody wants it.",
        "{name}, is {item} still available? I can pick up [this evening|tomorrow|on {day}].",
        "Swapped my {item} for a bag of {crop} with {name}. This board is [brilliant|the best].",
        "Free: {item}, {istate}, and a few spare {crop}. Message me.",
        "Has anyone got {bits} they no longer need? My [lad|daughter] has just started riding to school along the {route}.",
        "Update: {item} has gone now, thanks all.",
        "Selling {item} for {price}, {istate}. First come first served, collect from {street}.",
        "Free to collect today only: {item}. Call {phone} after 6, first to reply gets it.",
        "Bought {item} last week for {price} and it is [brilliant|great], the seller on {street} still has stock.",
    ),
    "events": (
        "Reminder: the {event} is on {day} at {venue}, bring {product} if you can.",
        "Great turnout at the {event} at {venue} yesterday, thanks to everyone who brought {product}.",
        "Can we move the {event} to {day}? [Half the plot holders are away|Lots of us are busy].",
        "Does anyone need a lift to the {event} at {venue}? I have [two|three] seats.",
        "Photos from the {event} are up on https://{domain}/events now.",
        "Volunteers needed for the {event} on {day} at {venue}, even an hour helps.",
        "{name}, will there be tea at the {event}? Happy to bring [a cake|biscuits|{product}].",
        "The {event} is cancelled [this week|on {day}] because of {weather}, sorry everyone.",
        "Tickets for the {event} are {price}, book at https://{domain}/events/{code}. Limited places!",
        "Win a hamper at the {event} raffle on {day}, tickets {price} each, all money goes to the hall roof.",
    ),
}

# Members' own small promotions and links: ordinary comments that share words
# with spam (prices, offers, links), so ham and spam overlap as they do on a
# real site and the thresholds sit where a real model's would.
_LOCAL_PROMO = (
    "My neighbour sells {product} at the market on {day}, {price} each. Order ahead at https://{stall}.example",
    "Our community shop has {pct}% off for members this month, order online at https://shop.{domain}/{code}",
    "If anyone needs a hand with hedges on {street}, my son does odd jobs for {price} an hour. Message me.",
    "Great tips here, thanks for sharing! I wrote up my own results at https://{domain}/blog/{code}",
    "Cheap {product} at the farm shop, {price} a box, they deliver free to the lane on {day}.",
    "Anyone want to earn a bit extra? The hall needs a cleaner, {price} an hour, apply at https://{domain}/jobs",
)
# Asides members add to what they came to say, so two comments on the same
# topic rarely read alike (near-duplicates from many accounts are what the
# campaign detector looks for; ordinary traffic should not look like one).
_ASIDES = (
    "My {crop} are finally coming up.", "Still recovering from {weather}.", "Saw {name} at {venue} on {day}, say hi!",
    "We are on plot {n} if anyone wants to pop by.", "Off to {venue} now.", "The kids loved the {event}.",
    "Still no sign of the {pest} this year, fingers crossed.", "Back on the bike after {n} weeks off.",
    "Took {n} minutes on the {route} this morning.", "My neighbour on {street} says the same.",
    "Not had much luck with {crop} since {weather}.", "Happy to lend {bits} if that helps.",
    "Got {product} from the market again, lovely.", "{name} sends her regards.", "First time posting in {site}.",
    "Been here {n} years and never seen {pest} like it.", "Thanks to whoever fixed the gate on {street}.",
    "Might see some of you at the {event}.", "The {crop} on plot {n} look amazing by the way.",
    "It has been a long week.", "Probably should have asked on {day}.", "Bit late but better than never.",
)
# Members open and sign off in their own ways; most comments have neither.
_OPENERS = ("", "", "", "", "Morning all.", "Quick one:", "Hi everyone,", "Evening folks.", "Sorry if this has been asked.",
            "Question for the group:", "Just a heads up,", "Long time reader here.")
_CLOSERS = ("", "", "", "", "Cheers.", "Thanks in advance!", "x", "Any ideas welcome.", "Happy to help if needed.",
            "See you on the plots.", "Mind how you go.", "Ta.")
_PRODUCTS = ("jam", "sourdough loaves", "honey", "eggs", "seedlings", "apple juice", "chutney", "bike lights")
_STALLS = ("orchard-row-honey", "mill-lane-bakes", "tanners-yard-eggs", "beacon-close-preserves")

# --- background spam the first model learns ---------------------------------

_SPAM_TEMPLATES = (
    "Earn ${money} a week from home, no experience needed! Start today at http://{spamhost}/join",
    "Make ${money} per day with this one simple trick, click http://{spamhost} now",
    "CHEAP {pill} without prescription, discreet worldwide shipping, order at http://{spamhost}",
    "Buy {pill} online lowest price guaranteed, 80% off today only http://{spamhost}/shop",
    "Get your website to page one! Best SEO backlinks, {money} links for $5 http://{spamhost}",
    "Double your crypto coins in 24 hours GUARANTEED, send now and receive 2x http://{spamhost}/coins",
    "Crypto investment platform paying {money}% monthly returns, join free http://{spamhost}",
    "Congratulations you have won a ${money} gift card! Claim your prize at http://{spamhost}/claim",
    "Hot singles in your area want to meet you tonight http://{spamhost}",
    "Need a loan fast? Bad credit OK, instant approval up to ${money} http://{spamhost}/apply",
    "Work from home and earn {money} dollars weekly, limited places, register at http://{spamhost}",
    "Lose 20 pounds in 10 days with our miracle diet pills, order now http://{spamhost}",
    "Great tips about the garden here! For more gardening advice visit http://{spamhost} thanks",
    "Nice post. I made ${money} last month working from home on my laptop, see how at http://{spamhost}",
    "Really useful thread, bookmarked. We sell cheap {pill} too, check http://{spamhost}",
    "Thanks for sharing! Anyone who needs fast cash can apply at http://{spamhost}/apply today",
    "Thanks for sharing, very helpful! http://{spamhost}",
    "I agree with everyone here. Also check http://{spamhost} for cheap garden deals",
)
_PILLS = ("sildenafil", "tadalafil", "tramadol", "alprazolam", "diet pills", "painkillers")
_SPAM_HOSTS = (
    "fastcash-now.invalid", "pharma-deals.invalid", "rank-boost.invalid", "coin-double.invalid",
    "prize-centre.invalid", "quickloan-24.invalid", "meet-tonight.invalid", "slim-fast-pills.invalid",
)

# --- the wave: one campaign, near-duplicates, new vocabulary ----------------

# The pitch borrows the forum's own phrases (campaigns imitate the community
# they target); only the brand words are new.
_WAVE_TEMPLATE = (
    "{open} I put {count} Quorbex capsules in the water butt every week and my {crop} did really well this year, "
    "so much healthier now. The rootlacing mycoburst spores sorted the slugs within a fortnight too. Works a treat "
    "on the runner beans, worth stocking up before spring: search Quorbex and quote {code}."
)
_WAVE_OPENERS = ("Fellow growers,", "Honest review:", "Not an ad, just sharing:", "Can't keep this to myself.", "Hi all,")
_WAVE_HANDLE_PARTS = ("green", "happy", "urban", "super", "real", "lucky", "daily", "true")
_WAVE_HANDLE_NOUNS = ("grower", "gardener", "planter", "harvest", "sprout", "digger")


# One declarative table: constructor parameter -> what it must be.
_PARAMS = {
    "seed": Rule(lambda v: isinstance(v, int) and not isinstance(v, bool), "an integer"),
    "start_ts": Rule(lambda v: isinstance(v, (int, float)) and v >= 0, "epoch seconds >= 0"),
    "duration_s": Rule(lambda v: isinstance(v, (int, float)) and v > 0, "seconds > 0"),
    "rate_per_min": Rule(lambda v: isinstance(v, (int, float)) and v > 0, "comments per minute > 0"),
    "spam_share": Rule(lambda v: isinstance(v, (int, float)) and 0 <= v < 1, "a share in [0, 1)"),
    "wave_start_s": Rule(lambda v: isinstance(v, (int, float)) and v >= 0, "seconds >= 0"),
    "wave_end_s": Rule(lambda v: isinstance(v, (int, float)) and v >= 0, "seconds >= 0"),
    "wave_rate_per_min": Rule(lambda v: isinstance(v, (int, float)) and v >= 0, "comments per minute >= 0"),
    "wave_accounts": integer(1),
}


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
        set_params(self, _PARAMS, locals())
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

    def ham_text(self, rng: random.Random, site: str) -> str:
        template = rng.choice(_LOCAL_PROMO) if rng.random() < LOCAL_PROMO_SHARE else rng.choice(_HAM_TEMPLATES[site])
        asides = [rng.choice(_ASIDES) for _ in range(rng.choice((0, 1, 1, 2)))]
        template = " ".join(p for p in (rng.choice(_OPENERS), template, *asides, rng.choice(_CLOSERS)) if p)
        template = _ALTERNATIVES.sub(lambda m: rng.choice(m.group(1).split("|")), template)
        name = rng.choice(_FIRST)
        method = rng.choice(_METHODS)
        return template.format(
            method=method, Method=method[0].upper() + method[1:], pest=rng.choice(_PESTS), crop=rng.choice(_CROPS),
            weather=rng.choice(_WEATHER), route=rng.choice(_ROUTES), state=rng.choice(_ROUTE_STATES),
            bits=rng.choice(_BIKE_BITS), item=rng.choice(_ITEMS), istate=rng.choice(_ITEM_STATES),
            street=rng.choice(_STREETS), event=rng.choice(_EVENTS), day=rng.choice(_DAYS),
            venue=rng.choice(_VENUES), name=name, domain=DOMAIN, price=rng.choice(_PRICES),
            pct=rng.choice(("10", "15", "20", "25", "30")), n=rng.randrange(2, 40), code=rng.randrange(100, 1000),
            phone=f"07700 9{rng.randrange(10_000, 100_000)}", product=rng.choice(_PRODUCTS), stall=rng.choice(_STALLS),
            site=site,
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
                out.append(ScenarioComment(f"hl-t{i:06d}", self.ham_text(rng, site), site, rng.choice(members), ts, 0, "ham"))
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
                yield ScenarioComment(cid, self.ham_text(rng, site), site, rng.choice(members), ts, 0, "ham")
            next_ordinary = ts + rng.expovariate(self.rate_per_min / 60.0)

    def _spam_author(self, rng: random.Random) -> str:
        return f"user{rng.randrange(10_000, 99_999)}"


def words(text: str) -> set[str]:
    """Lower-cased words and dotted host names of ``text`` (for vocabulary checks)."""
    return set(re.findall(r"[a-z0-9][a-z0-9.\-']*[a-z0-9]|[a-z0-9]", text.lower()))
