"""An invented community board over simulated days, and a replay of it through the campaign detector.

Everything here is made up.  *Larkspur Yard* is the board of an invented
housing co-op, with two sites: the main board (``larkspur-yard.example``) and
its kitchen board (``larkspur-kitchen.example``).  Its members post in
recurring formats, steadily, day after day: dish reports at dinner time,
the morning grid puzzle, watering rotas, tool-share logs, found items,
leftovers in the shared fridge, and the notes visitors leave without an
account (so each one is a new author to the detector).  Some kinds come in bursts: the weekly market
list on one morning a week, replies when an event is announced, welcomes for a
newcomer.  Around them is ordinary chatter, a trickle of background spam, and
a few newcomers joining each day.

On the last day (the *test day*) campaigns run from fresh accounts, each a
template with slots posted as near-duplicates: three pitches for invented
products (a meal-kit box, a savings scheme, a seasoning that imitates the
dish-report format), each once in plain text and once obfuscated
(:func:`obfuscate`: look-alike letters, zero-width characters, leetspeak,
spaced letters).

:func:`play` replays the board through campaign policies (one per simulated
worker, taking turns over batches, on one Redis) with the scores a model
gives, and measures what the detector did: campaigns started (true and
false), ham held because of campaigns, recall for plain and obfuscated
campaigns, and the detection delay in comments.

The generator is deterministic for a seed (every random choice comes from a
:class:`random.Random` seeded with a string).
"""
from __future__ import annotations

import random
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np

from model.params import integer, real, set_params
from ops.lab.scenario import ScenarioComment

YARD = "larkspur-yard.example"
KITCHEN = "larkspur-kitchen.example"
SITES = (YARD, KITCHEN)
DAY_S = 86_400.0
_ALTERNATIVES = re.compile(r"\[([^\[\]]*)\]")


@dataclass(frozen=True)
class BoardComment(ScenarioComment):
    """One invented comment with its truth (see :class:`ops.lab.scenario.ScenarioComment`).

    ``kind`` is the format (``dish``, ``puzzle``, ...), ``chatter``, ``spam``
    (background spam) or ``campaign``; ``campaign`` names the campaign (empty
    otherwise) and ``obfuscated`` says whether its text was disguised.
    """

    campaign: str = ""
    obfuscated: bool = False


# --- the co-op's words --------------------------------------------------------

_GIVEN = ("Ada", "Basil", "Cora", "Dario", "Elin", "Fen", "Greta", "Hollis", "Ines", "Jory", "Kit", "Lars", "Mina",
          "Noor", "Otto", "Pia", "Rafe", "Sunniva", "Teo", "Una", "Vik", "Wilda", "Yusra", "Zane", "Aurel", "Bettany",
          "Cosmo", "Dagny", "Emrys", "Fleur")
_HANDLE_PARTS = ("_b4", "_flat12", "_garden", "_stairs", "_bikes", "_loft", "", "_yard", "_c2", "_kettle", "_west",
                 "_north", "_a7", "_cooks", "_plots")
_DISHES = ("lentil stew", "mushroom risotto", "chickpea curry", "leek and potato soup", "vegetable lasagne",
           "bean chilli", "shepherd's pie", "pumpkin gnocchi", "spinach dal", "fish pie", "barley broth",
           "cauliflower cheese", "ratatouille", "stuffed peppers", "noodle stir fry", "tomato orzo")
_SIDES = ("garlic bread", "a green salad", "roast carrots", "flatbreads", "brown rice", "coleslaw", "buttered kale",
          "crusty rolls", "pickled onions", "mash")
_VERDICTS = ("Went down well.", "Seconds all round.", "A bit too salty, sorry all.", "Kids ate every bit.",
             "Needed more time in the oven.", "Would make again.", "Plenty left in the fridge.", "Easy and cheap.")
_REACTIONS = ("Tough one today.", "Lucky guess on the last line.", "Easy start to the week.", "Nearly lost it.",
              "Who picks these words?", "Best score this month.", "Coffee first next time.", "Done before the kettle.")
_BEDS = ("the herb beds", "beds one to four", "the greenhouse", "the fruit cage", "the tomato row",
         "the pots by the gate", "the bean trench", "the seedling shelf")
_TOOLS = ("long ladder", "hedge trimmer", "pressure washer", "wallpaper steamer", "drill", "pasta machine",
          "carpet cleaner", "sewing machine", "tile cutter", "camping stove")
_CONDITIONS = ("all fine", "blade a bit dull", "cleaned and dry", "battery low", "one wheel squeaks", "as found")
_ITEMS = ("a blue glove", "a set of keys", "a child's scarf", "a phone charger", "a library book", "a bike light",
          "reading glasses", "a water bottle", "a green umbrella", "a lunch box")
_PLACES = ("bike shed", "laundry room", "back stairs", "herb garden", "post boxes", "playground", "car park",
           "roof terrace", "bin store")
_TIMES = ("morning", "afternoon", "evening", "lunchtime")
_FRIDGE = ("the shared fridge", "the kitchen fridge", "the cool box by the hatch")
_STALLS = ("eggs from the farm stall", "bread from the bakery van", "the veg box order", "the bulk oats order",
           "apples from the orchard run", "the cheese share")
_EVENTS = ("roof terrace picnic", "repair evening", "seed swap", "stairwell painting day", "film night",
           "bulb planting morning", "clothes swap", "pancake breakfast")
_BRING = ("a salad", "folding chairs", "a speaker", "brushes", "a cake", "extra cups", "fairy lights", "a tool kit",
          "blankets", "lemonade")
_DAYS = ("Saturday", "Sunday", "Friday evening", "next Wednesday", "the weekend")
_BLOCKS = ("A", "B", "C", "D", "E")

# Recurring formats: (kind, site, comments per day, first hour, last hour, template).  Members post them
# steadily every day (the weekly market list only on the test day's weekday).
_FORMATS = (
    ("dish", KITCHEN, 250, 17.5, 20.5,
     "Dish report from the kitchen board: tonight we had {dish} for {n} people, rating {r} out of 5. "
     "Recipe is in the green folder on the shelf, leftovers go in the shared fridge."),
    ("puzzle", YARD, 250, 6.5, 9.0,
     "Morning grid {day_no}: solved in {k} of 6 tries. Same time tomorrow, grid fans! [{reaction}|||]"),
    ("rota", YARD, 60, 7.5, 8.5,
     "Watering rota: today it is {name}. Please fill the cans from the rain butt first and lock the shed "
     "after. Thanks!"),
    ("tools", YARD, 100, 9.0, 18.0,
     "Tool share log: borrowed the {tool} from shed 2 today, back tomorrow evening. Condition checked and noted "
     "in the book by the door."),
    ("found", YARD, 25, 8.0, 22.0,
     "Found {item} by the {place}. It is now at the office in the lost property box, ask at the desk if it is "
     "yours."),
    ("leftovers", KITCHEN, 80, 20.0, 22.5,
     "Leftovers in the shared fridge: {dish}, labelled and dated today. Help yourselves before it goes off, "
     "containers back to the kitchen please."),
)
# Visitors sign the board without an account (no author: each is new to the detector), every afternoon.
_VISITORS = ("visitors", YARD, 300, 13.0, 19.0,
             "Visitor note: we toured the yard with {name} today and the gardens were lovely. Thank you for "
             "having us, we hope to come back for the {event}.")
# Weekly: the market-list replies, one morning a week.
_WEEKLY = ("market", YARD, 60, 9.0, 10.0,
           "Market list for this week: block {block} would like {stall}. I can collect on Saturday morning, pay me "
           "back at the next meeting.")

_CHATTER = (
    "[Does anyone know|Has anyone heard] whether the {place} [is getting|will get] new lights? "
    "It is so dark after {hour}.",
    "Thanks to whoever [fixed|mended] the door by the {place}, it had been [sticking|banging] for weeks.",
    "[Is it just me or|Has anyone noticed] the lift in block {block} [is slow again|keeps stopping at floor {n}]?",
    "The {event} on {day} [sounds great|should be fun], {name}, count me in if there is room.",
    "I have {tool_lc} if anyone needs [one|it] for the weekend, just knock on {n}{block}.",
    "[Lovely|Great] to see so many people at the {place} [today|yesterday], the sun finally came out.",
    "Can we talk about the [bins|recycling] at the next meeting? The {place} [smells|is overflowing] again.",
    "Who [left|forgot] {item} in the {place}? [It is|I put it] on the shelf by the door.",
    "My [tomatoes|beans|courgettes|strawberries] on the roof terrace [are finally|have started] [ripening|flowering], {name} was right about the feed.",
    "[Heads up|Just so you know], the water will be off in block {block} on {day} from {hour} for [repairs|the boiler].",
    "[Any recommendations|Can anyone recommend] a [plumber|bike shop|vet|piano teacher] near the yard? [Ours retired|We just moved in last year].",
    "The [kids|little ones] loved the {event}, thank you {name} and everyone who helped.",
    "[Sorry|Apologies] for the noise from {n}{block} [last night|this morning], the [drill|washing machine] is fixed now.",
    "[Reminder to self|Note to all]: the {place} door [code|lock] changes on {day}, check the notice board.",
    "Is the [sauna|workshop|guest room] free on {day}? [Family visiting|Need it for a couple of hours].",
    "I [found|saw] [a hedgehog|two foxes|a heron] by the {place} at {hour}, [so lovely|made my day].",
    "{name}, did the [recipe|seed order|parcel] [turn up|work out] in the end?",
    "[Brilliant|Great] meeting last night, the minutes are on the board by the {place}.",
    "Could whoever [borrowed|has] the {tool_lc} [bring it back|return it] to the shed? Someone else has booked it.",
    "[Anyone fancy|Who is up for] a [walk|run|swim] along the river on {day}? Leaving from the {place} at {hour}.",
)
_ASIDES = ("Cheers.", "Thanks all.", "x", "Much appreciated.", "No rush.", "Ta.", "See you around the yard.",
           "Hope everyone is well.", "Long week.", "", "", "", "")
_SPAM = (
    "Earn ${money} a week from home, no experience needed! Start today at http://{host}/join",
    "CHEAP {pill} without prescription, discreet shipping, order at http://{host}",
    "Congratulations you have won a ${money} gift card! Claim your prize at http://{host}/claim",
    "Double your crypto coins in 24 hours GUARANTEED, send now and receive 2x http://{host}/coins",
    "Need a loan fast? Bad credit OK, instant approval up to ${money} http://{host}/apply",
    "Great post! I made ${money} last month working from my laptop, see how at http://{host}",
)
_PILLS = ("sildenafil", "tramadol", "diet pills", "painkillers")
_SPAM_HOSTS = ("fastcash-now.invalid", "pharma-deals.invalid", "prize-centre.invalid", "coin-double.invalid",
               "quickloan-24.invalid")

# --- campaigns (test day only) ------------------------------------------------

# (name, template, first minute of the test day, minutes, comments per minute, fresh accounts, obfuscated)
_CAMPAIGNS = (
    ("meal-kit", 10 * 60 + 20, 60, 7.0, 140, False),
    ("savings", 12 * 60 + 5, 70, 5.0, 110, False),
    ("seasoning", 18 * 60 + 0, 60, 6.0, 120, False),
    ("meal-kit-disguised", 14 * 60 + 10, 60, 7.0, 140, True),
    ("savings-disguised", 15 * 60 + 50, 70, 5.0, 110, True),
    ("seasoning-disguised", 19 * 60 + 30, 60, 6.0, 120, True),
)
_PITCHES = {
    "meal-kit": "{open} the {meal} box from Zelvantra was on our table in {mins} minutes and the [kids|whole flat] "
                "asked for seconds. No shopping, no waste. Code {code} gets a free first box at zelvantra-kits.example",
    "savings": "{open} since I moved my savings into the Pellucid neighbour fund it has grown {pct} percent in {weeks} "
               "weeks with no risk at all. [Ask me how|Happy to explain] or look up pellucid-fund.example and quote {code}.",
    "seasoning": "Dish report: {dish} with Corvane seasoning, cooked by me for {n} of us. {verdict} Rating 5/5. "
                 "Corvane sachets are {pct}% off this week at corvane-pantry.example with code {code}.",
}
_PITCH_OPENERS = ("Neighbours,", "Honest review:", "Not an ad, just sharing:", "Had to tell the yard:", "Hi all,")
_MEALS = ("curry", "pasta", "tray bake", "noodle", "pie")
_FRESH_PARTS = ("sunny", "happy", "real", "daily", "lucky", "urban", "true", "kind")
_FRESH_NOUNS = ("neighbour", "cook", "saver", "helper", "homemaker", "foodie")

# Look-alike letters (Cyrillic and Greek code points that render like these Latin ones).
_LOOKALIKES = {"a": "\u0430", "c": "\u0441", "e": "\u0435", "o": "\u043e", "p": "\u0440", "x": "\u0445",
               "y": "\u0443", "i": "\u0456", "s": "\u0455", "k": "\u03ba", "h": "\u04bb"}
_ZERO_WIDTH = ("\u200b", "\u200c", "\u200d", "\u2060", "\ufeff")
_LEET = {"a": "4", "e": "3", "o": "0", "i": "1", "s": "5", "t": "7"}


def obfuscate(text: str, rng: random.Random, *, share: float = 0.5) -> str:
    """Disguise ``share`` of the words of ``text`` the ways spammers do, a trick per word.

    The tricks: look-alike letters, zero-width characters inside the word,
    leetspeak, letters spaced out (never two neighbouring words, which would
    read as one), and mixed case.  A reader still reads the same text.
    """
    out = []
    spaced_last = False
    for word in text.split(" "):
        letters = sum(ch.isalpha() for ch in word)
        if letters < 3 or rng.random() >= share or "." in word.strip(".,!?:"):
            out.append(word)
            spaced_last = False
            continue
        trick = rng.choice(("lookalike", "zero-width", "leet", "spaced", "case"))
        if trick == "spaced" and (spaced_last or not word.isalpha()):
            trick = "lookalike"
        spaced_last = trick == "spaced"
        if trick == "lookalike":
            word = "".join(_LOOKALIKES.get(ch, ch) if rng.random() < 0.7 else ch for ch in word)
        elif trick == "zero-width":
            cuts = sorted(rng.sample(range(1, len(word)), min(2, len(word) - 1)))
            word = "".join(word[a:b] + rng.choice(_ZERO_WIDTH) for a, b in zip([0] + cuts, cuts)) + word[cuts[-1]:]
        elif trick == "leet":
            word = "".join(_LEET.get(ch, ch) if ch in _LEET and rng.random() < 0.6 else ch for ch in word)
        elif trick == "spaced":
            word = " ".join(word)
        else:
            word = "".join(ch.upper() if rng.random() < 0.5 else ch for ch in word)
        out.append(word)
    return " ".join(out)


# One declarative table: constructor parameter -> what it must be (``members`` is kept as ``n_members``:
# ``members()`` is the method that lists them).
_PARAMS = {
    "seed": integer(0, 2**63 - 1),
    "start_ts": real(0.0, 1e12),
    "history_days": integer(1, 3650),
    "n_members": integer(20),
    "chatter_per_day": integer(0),
    "joiners_per_day": integer(0),
    "spam_per_day": integer(0),
    "campaign_scale": real(0.0, 1e6),
}


class Board:
    """Larkspur Yard over ``history_days`` ordinary days and one test day with campaigns.

    Parameters
    ----------
    seed : every random choice derives from it.
    start_ts : epoch seconds of the first day's midnight (UTC).
    history_days : ordinary days before the test day.
    members : established members (all post from the first day).
    chatter_per_day : free-form comments per day.
    joiners_per_day : newcomers joining each day; they post a little, formats included.
    spam_per_day : background spam per day (the model learns it).
    campaign_scale : multiplies each campaign's rate (0 = no campaigns).
    """

    def __init__(self, *, seed: int = 3, start_ts: float = 1_800_230_400.0, history_days: int = 6, members: int = 240,
                 chatter_per_day: int = 2500, joiners_per_day: int = 3, spam_per_day: int = 40,
                 campaign_scale: float = 1.0):
        set_params(self, _PARAMS, dict(locals(), n_members=members))

    @property
    def test_day_ts(self) -> float:
        """Epoch seconds of the test day's midnight."""
        return self.start_ts + self.history_days * DAY_S

    def _rng(self, part: str) -> random.Random:
        return random.Random(f"larkspur-yard:{self.seed}:{part}")

    def members(self) -> list[str]:
        """The established members' handles."""
        rng = self._rng("members")
        out: list[str] = []
        while len(out) < self.n_members:
            handle = f"{rng.choice(_GIVEN).lower()}{rng.choice(_HANDLE_PARTS)}{rng.randrange(10, 100)}"
            if handle not in out:
                out.append(handle)
        return out

    def comments(self) -> list[BoardComment]:
        """Every comment of every day, in time order, with ids ``ly-0000001`` on."""
        members = self.members()
        joiners: list[tuple[float, str]] = []  # (joined at, handle)
        drafts: list[tuple[float, str, str, str, int, str, str, bool]] = []
        for day in range(self.history_days + 1):
            rng = self._rng(f"day-{day}")
            day_ts = self.start_ts + day * DAY_S
            for j in range(self.joiners_per_day):
                joined = day_ts + rng.uniform(8, 20) * 3600
                handle = f"new_{rng.choice(_GIVEN).lower()}{day}{j}{rng.randrange(100, 1000)}"
                joiners.append((joined, handle))
                drafts += self._welcomes(rng, joined, handle, members)
            recent = [h for t, h in joiners if day_ts - 3 * DAY_S <= t < day_ts + DAY_S]
            drafts += self._formats(rng, day, day_ts, members, joiners)
            drafts += self._chatter(rng, day_ts, members, joiners)
            drafts += self._spam(rng, day_ts)
            if day in (1, self.history_days // 2 + 1, self.history_days):
                drafts += self._event_replies(rng, day_ts, members, recent)
            if day == self.history_days and self.campaign_scale > 0:
                drafts += self._campaigns(day_ts)
        drafts.sort(key=lambda d: d[0])
        return [BoardComment(f"ly-{n:07d}", text, site, author, ts, label, kind, campaign, obfuscated)
                for n, (ts, text, site, author, label, kind, campaign, obfuscated) in enumerate(drafts, 1)]

    # -- the parts of a day ----------------------------------------------------------------

    def _author(self, rng: random.Random, members: list[str], joiners, ts: float, pool: slice = slice(None)) -> str:
        """A member of ``pool``; one comment in twenty is a newcomer's who joined before ``ts``."""
        present = [h for t, h in joiners if t <= ts]
        if present and rng.random() < 0.05:
            return rng.choice(present[-12:])
        return rng.choice(members[pool])

    def _formats(self, rng, day: int, day_ts: float, members, joiners) -> list:
        out = []
        formats = [*_FORMATS, _VISITORS]
        if day % 7 == self.history_days % 7:
            formats.append(_WEEKLY)
        for n, (kind, site, per_day, h0, h1, template) in enumerate(formats):
            pool = slice(n * 30 % len(members), n * 30 % len(members) + 80)  # each format has its regulars
            t = day_ts + h0 * 3600
            rate = per_day / ((h1 - h0) * 3600)
            while True:
                t += rng.expovariate(rate)
                if t >= day_ts + h1 * 3600:
                    break
                text = _fill(template, rng, day_no=400 + day)
                author = "" if kind == "visitors" else self._author(rng, members, joiners, t, pool)
                out.append((t, text, site, author, 0, kind, "", False))
        return out

    def _chatter(self, rng, day_ts: float, members, joiners) -> list:
        out = []
        for _ in range(self.chatter_per_day):
            t = day_ts + rng.uniform(7, 23) * 3600
            body = rng.choice(_CHATTER)
            text = " ".join(p for p in (body, rng.choice(_ASIDES)) if p)
            out.append((t, _fill(text, rng), rng.choice(SITES), self._author(rng, members, joiners, t), 0, "chatter",
                        "", False))
        return out

    def _spam(self, rng, day_ts: float) -> list:
        out = []
        for _ in range(self.spam_per_day):
            t = day_ts + rng.uniform(0, 24) * 3600
            text = rng.choice(_SPAM).format(money=rng.choice(("500", "1000", "250", "90")), pill=rng.choice(_PILLS),
                                            host=rng.choice(_SPAM_HOSTS))
            out.append((t, text, rng.choice(SITES), f"user{rng.randrange(10_000, 99_999)}", 1, "spam", "", False))
        return out

    def _welcomes(self, rng, joined: float, handle: str, members) -> list:
        out = []
        name = handle.split("_", 1)[1].rstrip("0123456789").capitalize()
        for _ in range(rng.randrange(4, 9)):
            t = joined + rng.expovariate(1 / 600.0)
            text = _fill(f"Welcome to the yard, {name}! [Say hi at|Come along to] the {{place}} [some time|on {{day}}]. "
                         "{aside}", rng)
            out.append((t, text, YARD, rng.choice(members), 0, "welcome", "", False))
        return out

    def _event_replies(self, rng, day_ts: float, members, recent) -> list:
        """An event is announced; members reply within the hour in one phrasing (a legitimate burst)."""
        event, day = rng.choice(_EVENTS), rng.choice(_DAYS)
        at = day_ts + rng.uniform(11, 15) * 3600
        out = []
        for _ in range(36):
            t = at + rng.expovariate(1 / 900.0)
            author = rng.choice(recent) if recent and rng.random() < 0.1 else rng.choice(members)
            text = _fill(f"Count me in for the {event} on {day}, I [will|can] bring {{bring}}. {{aside}}", rng)
            out.append((t, text, YARD, author, 0, "event", "", False))
        return out

    def _campaigns(self, day_ts: float) -> list:
        out = []
        for name, minute, minutes, per_min, accounts, disguised in _CAMPAIGNS:
            rng = self._rng(f"campaign-{name}")
            handles = [f"{rng.choice(_FRESH_PARTS)}{rng.choice(_FRESH_NOUNS)}{rng.randrange(1000, 100_000)}"
                       for _ in range(accounts)]
            pitch = _PITCHES[name.removesuffix("-disguised")]
            t, end = day_ts + minute * 60.0, day_ts + (minute + minutes) * 60.0
            while True:
                t += rng.expovariate(per_min * self.campaign_scale / 60.0)
                if t >= end:
                    break
                text = _fill(pitch, rng)
                if disguised:
                    text = obfuscate(text, rng)
                site = KITCHEN if name.startswith("seasoning") else rng.choice(SITES)
                out.append((t, text, site, rng.choice(handles), 1, "campaign", name, disguised))
        return out

    def training_rows(self) -> list[BoardComment]:
        """Labelled comments for a first model: the history days' ham (one in three) and all their spam."""
        day_end = self.test_day_ts
        return [c for c in self.comments() if c.ts < day_end and (c.label or int(c.id[3:]) % 3 == 0)]


def _fill(template: str, rng: random.Random, **fixed) -> str:
    """One phrasing of ``template``: ``[a|b]`` picks one, ``{slot}`` is filled from the co-op's words."""
    template = _ALTERNATIVES.sub(lambda m: rng.choice(m.group(1).split("|")), template)
    values = {
        "dish": rng.choice(_DISHES), "side": rng.choice(_SIDES), "name": rng.choice(_GIVEN),
        "name2": rng.choice(_GIVEN), "n": rng.randrange(3, 14), "r": rng.randrange(3, 6),
        "verdict": rng.choice(_VERDICTS), "k": rng.randrange(2, 7), "reaction": rng.choice(_REACTIONS),
        "bed": rng.choice(_BEDS), "bed2": rng.choice(_BEDS), "block": rng.choice(_BLOCKS), "tool": rng.choice(_TOOLS),
        "tool_lc": "a " + rng.choice(_TOOLS), "day": rng.choice(_DAYS), "condition": rng.choice(_CONDITIONS),
        "item": rng.choice(_ITEMS), "place": rng.choice(_PLACES), "time": rng.choice(_TIMES),
        "fridge": rng.choice(_FRIDGE), "stall": rng.choice(_STALLS), "event": rng.choice(_EVENTS),
        "bring": rng.choice(_BRING), "hour": f"{rng.randrange(5, 11)}pm", "aside": rng.choice(_ASIDES),
        "open": rng.choice(_PITCH_OPENERS), "meal": rng.choice(_MEALS), "mins": rng.choice((10, 12, 15, 20)),
        "code": f"{rng.choice('ABCDEFGHJKLMNPQRSTUVWXYZ')}{rng.randrange(100, 1000)}", "pct": rng.choice((12, 15, 18, 20, 25)),
        "weeks": rng.choice((3, 4, 6, 8)),
    }
    values.update(fixed)
    return template.format(**values).strip()


# --- a replay through the detector ------------------------------------------------------

@dataclass
class Replay:
    """What the detector did on the board (see :func:`play`)."""

    comments: list[BoardComment]
    members: dict[str, str] = field(default_factory=dict)  # comment id -> campaign id
    starts: list[dict] = field(default_factory=list)       # campaign_start data, in order
    model_held: set[str] = field(default_factory=set)      # ids the model alone would hold or reject
    seconds: float = 0.0

    def figures(self, *, since: float) -> dict:
        """The detector's figures over comments at or after ``since`` (epoch seconds)."""
        window = [c for c in self.comments if c.ts >= since]
        ham = [c for c in window if c.label == 0]
        held_ham = [c for c in ham if c.id in self.members and c.id not in self.model_held]
        flagged = [c for c in window if c.id in self.members]
        out = {"ham": len(ham), "ham_held_by_campaigns": len(held_ham),
               "ham_held_by_campaigns_share": len(held_ham) / len(ham) if ham else 0.0,
               "flagged": len(flagged),
               "precision": (sum(1 for c in flagged if c.kind == "campaign") / len(flagged)) if flagged else None}
        for disguised, label in ((False, "plain"), (True, "obfuscated")):
            camp = [c for c in window if c.kind == "campaign" and c.obfuscated == disguised]
            out[f"{label}_campaign_comments"] = len(camp)
            out[f"{label}_recall"] = (sum(1 for c in camp if c.id in self.members) / len(camp)) if camp else None
            delays, recalls = {}, {}
            for name in sorted({c.campaign for c in camp}):
                order = [c for c in camp if c.campaign == name]
                delays[name] = next((n for n, c in enumerate(order, 1) if c.id in self.members), None)
                recalls[name] = sum(1 for c in order if c.id in self.members) / len(order)
            out[f"{label}_delay_comments"] = delays
            out[f"{label}_recall_by_campaign"] = recalls
        truth = {c.id: c for c in self.comments}
        true_starts = false_starts = 0
        by_campaign: dict[str, list[BoardComment]] = {}
        for cid, campaign in self.members.items():
            by_campaign.setdefault(campaign, []).append(truth[cid])
        for start in self.starts:
            if start.get("started", 0) < since:
                continue
            group = by_campaign.get(start["id"], [])
            if sum(c.kind == "campaign" for c in group) * 2 > len(group):
                true_starts += 1
            else:
                false_starts += 1
        out["campaigns_started_true"] = true_starts
        out["campaigns_started_false"] = false_starts
        return out


def blind_scores(comments: Sequence[BoardComment], scores: Sequence[float], *, seed: int = 0) -> np.ndarray:
    """Scores of a model blind to the campaigns: each campaign comment gets the score of a random ham comment."""
    scores = np.asarray(scores, dtype=float).copy()
    ham = np.array([s for c, s in zip(comments, scores) if c.label == 0 and c.kind != "spam"])
    rng = np.random.default_rng(seed)
    camp = [i for i, c in enumerate(comments) if c.kind == "campaign"]
    if camp and ham.size:
        scores[camp] = rng.choice(ham, size=len(camp))
    return scores


def play(client, policies: Sequence, comments: Sequence[BoardComment], scores: Sequence[float], *,
         set_time: Callable[[float], None], keys, hold_threshold: float = 0.95, batch: int = 64,
         batch_s: float = 30.0, window_s: int = 600) -> Replay:
    """Replay ``comments`` through ``policies`` (simulated workers taking turns, one batch each).

    A batch is the next ``batch`` comments or those within ``batch_s``
    seconds of its first, whichever is fewer; ``set_time`` sets the policies'
    clock to the batch's last comment time before its policy sees it.  The
    model's own action is a hold at ``hold_threshold`` (a site hold threshold
    of 0.95 makes the model alone hold almost nothing).
    """
    import time

    from worker.campaignstore import RedisCampaignStore
    from worker.events import read_events

    store = RedisCampaignStore(client, keys)
    scores = [float(s) for s in scores]
    out = Replay(comments=list(comments))
    out.model_held = {c.id for c, s in zip(comments, scores) if s >= hold_threshold}
    t0 = time.perf_counter()
    i, turn = 0, 0
    next_tick = comments[0].ts + 60.0 if comments else 0.0
    while i < len(comments):
        j = i + 1
        while j < len(comments) and j - i < batch and comments[j].ts - comments[i].ts <= batch_s:
            j += 1
        if comments[j - 1].ts >= next_tick:  # what each serving process's monitor does every poll
            set_time(comments[j - 1].ts)
            store.end_idle(now=comments[j - 1].ts, window_s=window_s)
            next_tick = comments[j - 1].ts + 60.0
        set_time(comments[j - 1].ts)
        members = policies[turn % len(policies)].observe(store, comments[i:j], scores[i:j])
        for k, campaign in members.items():
            out.members[comments[i + k].id] = campaign
        i, turn = j, turn + 1
    out.seconds = time.perf_counter() - t0
    out.starts += [e.data for e in read_events(client, keys.events) if e.type == "campaign_start"]
    return out
