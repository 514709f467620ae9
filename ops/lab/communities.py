"""Invented communities unlike the demo's forum, for checks that a model holds up off its home ground.

A model is trained on one community's history and then meets another
community whose members talk about other things.  Everything here is made up:
the places, the people and the spam hosts (``.invalid``).

Three communities, each with its own sections, words and habits:

* *Saltmarsh Quay* (``saltmarsh-quay.example``): a harbour village's rowing
  club, tide watchers, village hall and lost-and-found board;
* *Larkspur Court* (``larkspur-court.example``): the residents of a block of
  flats, their choir and their book club;
* *Kettlewick Chess Circle* (``kettlewick-chess.example``): a town's chess and
  quiz club.

Each community writes *ordinary* comments (no link, no price, no offer: what
most people post) and, now and then, members' own notices with a link or a
price, the ham that shares words with spam.  Background spam of the usual
kinds arrives everywhere, worded for each community.

A :class:`CommunityScenario` is deterministic for a seed (string seeds, hashed
with SHA-512 by :mod:`random`, so ``PYTHONHASHSEED`` does not matter):

* :meth:`CommunityScenario.labelled` -- a labelled history (ham, member
  notices and background spam), for training or calibration;
* :meth:`CommunityScenario.ordinary` -- ordinary comments only.
"""
from __future__ import annotations

import random
import re
from dataclasses import dataclass, field

from ops.lab.scenario import ScenarioComment

_ALTERNATIVES = re.compile(r"\[([^\[\]]*)\]")
_SLOT = re.compile(r"\{(\w+)\}")


@dataclass(frozen=True)
class Community:
    """One invented community: where it lives, its sections, and how its members write.

    ``ordinary`` holds per-section templates without links, prices or offers;
    ``notices`` are members' own notices that carry a link or a price.
    ``[a|b]`` picks one phrasing, ``{slot}`` a word from ``slots``.
    """

    name: str
    domain: str
    prefix: str
    ordinary: dict[str, tuple[str, ...]]
    notices: tuple[str, ...]
    asides: tuple[str, ...]
    slots: dict[str, tuple[str, ...]] = field(default_factory=dict)

    @property
    def sections(self) -> tuple[str, ...]:
        return tuple(self.ordinary)


_OPENERS = ("", "", "", "", "Hello all,", "Quick question:", "Morning.", "Evening everyone,", "Hi folks,",
            "Not sure where else to ask:", "Apologies if this is a repeat,")
_CLOSERS = ("", "", "", "", "Thanks!", "Cheers all.", "Much appreciated.", "See you soon.", "Take care.",
            "Any thoughts welcome.", "x")

SALTMARSH_QUAY = Community(
    name="Saltmarsh Quay",
    domain="saltmarsh-quay.example",
    prefix="sq",
    ordinary={
        "rowing-club": (
            "[Is anyone|Who is] rowing on {day}? The {boat} needs a crew of four and we only have {name} and me.",
            "The {boat} has a crack near the {part} again, please do not take her out until {name} has looked at it.",
            "[Lovely|Rough|Choppy] row out to {spot} this morning, the {bird} were everywhere.",
            "Can whoever borrowed the spare {gear} put [it|them] back in the boathouse? We need [it|them] for {day}.",
            "Training is moved to {time} on {day} because of the tide, sorry for the short notice.",
            "Well done to the {crew} crew, they finished third at the regatta in {town}.",
            "{name}, thanks for sorting the {part} on the {boat}. She feels much steadier now.",
            "Does anyone know if the slipway is [usable|clear] at low water yet? Last week it was covered in weed.",
            "New members are welcome at the taster session on {day}, just turn up at the boathouse at {time}.",
            "Reminder to rinse the {gear} after a sea row, the salt is ruining [them|the fittings].",
            "I left my {thing} in the boathouse changing room, has anyone seen it?",
        ),
        "tide-watch": (
            "Spring tide tonight, the water came right up to the {place} again.",
            "[Saw|Spotted] a pair of {bird} on the mudflats by {spot} at {time}, first time this year.",
            "The {place} flooded [again|a bit] on {day}, mind your step if you walk that way.",
            "Has anyone else noticed the sandbank off {spot} moving? It looks [much|a lot] closer to the channel.",
            "Fog came in very fast this afternoon, could not see the harbour wall from the {place}.",
            "{name}, was that a seal off the end of the {place} yesterday? I only caught a glimpse.",
            "The new tide board by the {place} is wrong for {day}, check the almanac before you go out.",
            "Beautiful sunset over {spot} tonight, the whole bay went pink.",
            "Heard the foghorn going all night, did anyone else get any sleep?",
            "The storm moved half the shingle from the beach onto the {place}.",
        ),
        "village-hall": (
            "The {event} in the village hall went [really well|brilliantly], thank you to everyone who helped.",
            "Could we have the heating on earlier before the {event}? It was freezing last time.",
            "{name} is looking for help stacking chairs after the {event} on {day}.",
            "The hall committee meets on {day} at {time}, everyone is welcome to come and have their say.",
            "Does anyone have the key to the [store cupboard|kitchen hatch]? The {event} needs the urn.",
            "The roof over the stage is leaking again, I put a bucket under it.",
            "Who is organising the {event} this year? Happy to help with the tea.",
            "Lost property from the {event} is in the box by the door until {day}.",
            "The car park will be closed on {day} while they fix the drains.",
            "Thank you {name} for the lovely flowers in the entrance, they cheered everyone up.",
        ),
        "lost-and-found": (
            "Found a {thing} on the {place} this morning, it is at the harbour office now.",
            "Lost my {thing} somewhere between the {place} and {spot}, [any sightings|please shout if you find it].",
            "A {pet} has been sitting outside the chandlery all day, does anyone know whose it is?",
            "{name}, I think the {thing} you asked about is hanging on the boathouse door.",
            "Our {pet} is missing since {day}, [very timid|friendly but nervous], last seen near {spot}.",
            "Good news, the {pet} from yesterday is home again, thank you all for looking.",
            "Someone left a {thing} on the bench by the {place}, I have put it somewhere dry.",
        ),
    },
    notices=(
        "Fresh crab from the boat this afternoon, {price} a dozen at the quay, details at https://{domain}/catch",
        "The rowing club raffle is {price} a ticket, all money goes to the new {boat}. Book at https://{domain}/raffle",
        "Tide tables for the year are printed now, {price} from the harbour office or free at https://{domain}/tides",
        "My daughter is selling her old {gear} for {price}, message me if interested.",
        "Discount for members at the chandlery this week, {pct}% off {gear}, see https://{domain}/offers",
    ),
    asides=(
        "The {bird} are back on {spot}.", "Still windy here.", "The harbour looks lovely today.",
        "Say hello to {name} for me.", "Back from {town} at last.", "Mind the slippery steps by the {place}.",
        "Long day on the water.", "The tide waits for no one.", "Kettle is on at the boathouse.",
    ),
    slots={
        "day": ("Saturday", "Sunday morning", "Tuesday", "Thursday evening", "the bank holiday", "next weekend"),
        "time": ("seven", "half past six", "nine", "ten sharp", "noon", "the top of the tide"),
        "boat": ("Curlew", "old blue four", "Sea Lavender", "training pair", "Mary Ellen"),
        "part": ("rudder", "stern seat", "rigger", "bow", "keel strip", "fin"),
        "gear": ("oars", "life jackets", "buoyancy aids", "spray tops", "cox box", "seat pads"),
        "spot": ("Gull Point", "the old lighthouse", "the sandbar", "Heron Creek", "the outer moorings"),
        "bird": ("oystercatchers", "terns", "curlews", "little egrets", "brent geese", "godwits"),
        "crew": ("veterans", "juniors", "mixed four", "women's double"),
        "town": ("Merrow Bay", "Castlereach", "Penhallow", "Fenwick Sands"),
        "place": ("quay steps", "harbour wall", "sea wall", "coastal path", "fish market", "ferry ramp"),
        "event": ("quiz night", "harvest supper", "jumble sale", "ceilidh", "film evening", "coffee morning"),
        "thing": ("glove", "house key", "blue scarf", "reading glasses", "water bottle", "child's boot"),
        "pet": ("tabby cat", "black spaniel", "grey cat", "small terrier"),
        "name": ("Morag", "Tobias", "Enid", "Rafferty", "Ines", "Cormac", "Hilde", "Pascoe", "Nell", "Aurelio"),
        "price": ("£3", "£6", "£12", "£20", "£1 a ticket"),
        "pct": ("10", "15", "20"),
    },
)

LARKSPUR_COURT = Community(
    name="Larkspur Court",
    domain="larkspur-court.example",
    prefix="lc",
    ordinary={
        "residents": (
            "The lift on the {side} side is [stuck again|out of order], please report it if you have not already.",
            "Could whoever is parking in bay {n} please move, the removal van cannot get in.",
            "There is a smell of gas on the {floor} floor landing, has anyone called the {office}?",
            "Thank you to whoever swept the stairs on the {floor} floor, it looks so much better.",
            "The bins in the courtyard were not collected on {day} again, does anyone know why?",
            "Noise from flat {n} late at night is getting a bit much, could we all keep it down after eleven?",
            "{name}, the parcel for you was left with me, knock on {n} whenever you are in.",
            "The {office} says the hot water will be off on {day} morning for the boiler work.",
            "Does anyone else have damp on the north wall? The {office} keeps telling me it is condensation.",
            "Welcome to the new family in flat {n}, lovely to meet you on the stairs.",
            "The front door is not closing properly again, anyone could walk in.",
        ),
        "choir": (
            "Rehearsal is on {day} at {time} in the community room, we are starting the {piece}.",
            "Could the {voice} stay ten minutes after rehearsal to go over the middle section?",
            "{name}, thank you for the extra copies of the {piece}, I had lost mine.",
            "I will miss rehearsal on {day}, I have a [cold|hospital appointment], sorry everyone.",
            "The concert in the {venue} went so well, people are still talking about the {piece}.",
            "Does anyone have a spare folder? Mine fell apart during the {piece}.",
            "The {voice} sounded wonderful tonight, all that practice paid off.",
            "Who would like to sing at the care home on {day}? We need at least two {voice}.",
            "Please learn the words for the {piece} before {day}, we cannot keep reading from the sheets.",
            "Tea rota for rehearsals is on the noticeboard, please put your name down.",
        ),
        "book-club": (
            "Next month we are reading {book}, it is about {topic}.",
            "I finished {book} last night and I [cried at the end|still do not understand the ending].",
            "{name}, did you think the narrator in {book} was telling the truth? I am not so sure.",
            "Can we meet in flat {n} on {day}? The community room is booked for the choir.",
            "Who has my copy of {book}? It has my name written inside the cover.",
            "I found {book} hard going for the first hundred pages but it was worth it.",
            "Could we pick something shorter next time? Not all of us read that fast.",
            "The discussion about {topic} went on so long we never got to the cake.",
            "I am bringing {food} on {day}, someone else do drinks please.",
        ),
    },
    notices=(
        "Choir concert tickets are {price}, book through https://{domain}/concert before {day}",
        "Selling a nearly new {furniture} for {price}, too big for my flat, message me",
        "The residents' association subs are {price} a year, pay online at https://{domain}/subs",
        "Our book club has spare copies of {book} for {price} each, proceeds to the library fund",
        "Cleaner available for flats in the block, {price} an hour, references on request",
    ),
    asides=(
        "The courtyard roses are out.", "It has been a long week.", "Say hi to {name}.",
        "My cat sends her regards.", "The heating is finally working.", "The lift is working again for now.",
        "Back from my sister's at last.", "Still humming the {piece}.",
    ),
    slots={
        "side": ("east", "west", "garden", "street"),
        "floor": ("second", "third", "fourth", "ground", "top"),
        "office": ("housing office", "caretaker", "managing agent", "council"),
        "day": ("Monday", "Wednesday evening", "Friday", "Saturday afternoon", "next week", "the 21st"),
        "time": ("seven", "half seven", "six thirty", "eight"),
        "piece": ("spring anthem", "harbour song", "winter carol", "folk medley", "round in four parts"),
        "voice": ("altos", "tenors", "basses", "sopranos"),
        "venue": ("library hall", "old chapel", "community centre", "school gym"),
        "book": ("The Salt Orchard", "A Winter in Vellmoor", "The Clockmaker's Niece", "Nine Lanterns",
                 "Under the Glass Hill", "The Quiet Tenant"),
        "topic": ("two sisters who run a bakery", "a lighthouse keeper", "an old family feud", "a long walk home",
                  "a village that vanishes"),
        "food": ("a lemon cake", "cheese scones", "flapjacks", "a fruit salad"),
        "furniture": ("sofa bed", "wardrobe", "dining table", "bookcase"),
        "name": ("Dagny", "Eamon", "Priya", "Lucian", "Marisol", "Teodor", "Winifred", "Obi", "Signe", "Caspian"),
        "n": tuple(str(i) for i in range(1, 49)),
        "price": ("£4", "£8", "£15", "£30", "£50"),
    },
)

KETTLEWICK_CHESS = Community(
    name="Kettlewick Chess Circle",
    domain="kettlewick-chess.example",
    prefix="kc",
    ordinary={
        "club-nights": (
            "Club night is on {day} as usual, boards set up from {time}.",
            "Great game against {name} last week, I thought I had the {ending} won but it was a draw.",
            "Could someone bring the spare clocks on {day}? Two of ours need new batteries.",
            "Beginners are very welcome, we always have someone happy to go through the {opening}.",
            "The room is booked by the {group} on {day}, so we are in the back room instead.",
            "{name}, I looked at our game again and you were right about the knight move.",
            "Please put the pieces back in the right boxes, the {colour} set is missing a rook.",
            "Who wants to analyse the {opening} after the games on {day}? I keep losing with it.",
        ),
        "league": (
            "We play {team} away on {day}, we need one more player for board {n}.",
            "Result from {day}: we drew with {team}, well done everyone.",
            "The league table is out, we are [second|third|fourth] with two matches left.",
            "{name} won on board {n} with a lovely {ending}, the best game of the season.",
            "Can we start at {time} for the {team} match? Their captain asked.",
            "Reminder to record your moves properly, the league checks the score sheets.",
            "Lift share to the {team} match: I have room for three, leaving the library at {time}.",
        ),
        "quiz": (
            "Quiz night on {day}, teams of up to four, the theme is {theme}.",
            "Congratulations to the {quizteam}, they won the quiz by a single point.",
            "The tiebreaker question about {theme} was far too hard, {name}!",
            "Could we have fewer questions about {theme} next time? Some of us are hopeless.",
            "I am writing the next quiz, any requests for rounds?",
            "We need a new quizmaster for {day}, {name} is away.",
            "Picture round answers are pinned on the board if you want to check.",
        ),
    },
    notices=(
        "Club membership is {price} for the year, pay at https://{domain}/join or in cash on club night",
        "Selling my old tournament set and board for {price}, hardly used",
        "The junior tournament entry fee is {price}, sign up at https://{domain}/juniors",
        "The bookshop on the square gives members {pct}% off chess books this month",
    ),
    asides=(
        "Still thinking about that endgame.", "The kettle in the club room is broken again.",
        "Say hello to {name}.", "Late night, sorry for typos.", "I need more practice.",
        "The new clocks are lovely.", "My rating finally went up.",
    ),
    slots={
        "day": ("Tuesday", "Thursday", "Saturday morning", "next Monday", "the 9th"),
        "time": ("seven", "half six", "quarter to eight", "two"),
        "name": ("Bartholomew", "Irena", "Kwame", "Solveig", "Desmond", "Ottilie", "Ravi", "Greta", "Ambrose", "Lin"),
        "ending": ("rook ending", "pawn ending", "bishop against knight ending", "queen ending"),
        "opening": ("French defence", "Italian game", "London system", "Dutch defence", "English opening"),
        "group": ("knitting circle", "parish council", "history society", "baby group"),
        "colour": ("wooden", "green and white", "travel", "big"),
        "team": ("Hollins Park", "Ashby Rooks", "Millford", "the university second team"),
        "n": ("one", "two", "three", "four", "five", "six"),
        "theme": ("rivers", "old films", "famous bridges", "birds", "board games", "the moon"),
        "quizteam": ("Late Castlers", "Forked Again", "The Zugzwangs", "Quiz Pros Quo"),
        "price": ("£5", "£10", "£18", "£25"),
        "pct": ("10", "20"),
    },
)

COMMUNITIES = {c.prefix: c for c in (SALTMARSH_QUAY, LARKSPUR_COURT, KETTLEWICK_CHESS)}

# --- background spam, worded for whichever community it lands on ------------

_SPAM = (
    "Earn ${money} a week working from your sofa, no skills needed, sign up at http://{host}/start",
    "Cheapest {pill} online, no prescription, ships in a plain box, order at http://{host}",
    "Your {account} account is locked, verify your details within 24 hours at http://{host}/verify",
    "Boost your page to the top of search today, {money} backlinks for $9 only http://{host}",
    "Turn ${money} into ten times that with our trading bot, guaranteed profit http://{host}/bot",
    "You are today's lucky visitor! Collect your ${money} voucher now at http://{host}/claim",
    "Lonely tonight? Chat with singles near you at http://{host}",
    "Instant cash loans up to ${money}, no credit checks, approval in minutes http://{host}/apply",
    "Nice thread about {topic}. I earn ${money} a month from home, see how at http://{host}",
    "Thanks for posting about {topic}! Cheap {pill} for everyone at http://{host}",
    "Great info on {topic}, for more tips visit http://{host} thank you",
    "WIN a brand new phone, just enter your email at http://{host}/win before midnight",
    "Double your bitcoin in 12 hours, send any amount and receive twice back http://{host}/x2",
    "Best replica watches at 90% off, free shipping worldwide http://{host}/shop",
)
_SPAM_SLOTS = {
    "money": ("200", "750", "1500", "5000", "90"),
    "pill": ("sildenafil", "tramadol", "weight loss pills", "sleeping tablets", "painkillers"),
    "account": ("bank", "email", "parcel delivery", "streaming"),
    "host": ("easy-income.invalid", "pill-warehouse.invalid", "secure-login-check.invalid", "seo-rocket.invalid",
             "profit-bot.invalid", "voucher-desk.invalid", "singles-near.invalid", "cash-today.invalid",
             "prize-phone.invalid", "coin-twice.invalid", "replica-hub.invalid"),
}


def _fill(template: str, rng: random.Random, slots: dict, **fixed) -> str:
    text = _ALTERNATIVES.sub(lambda m: rng.choice(m.group(1).split("|")), template)

    def value(m: re.Match) -> str:
        name = m.group(1)
        if name in fixed:
            return str(fixed[name])
        if name == "n" and "n" not in slots:
            return str(rng.randrange(2, 40))
        return rng.choice(slots[name])

    # Slots may hold further slots (an aside naming a piece): fill until none is left.
    for _ in range(3):
        text = _SLOT.sub(value, text)
    return text


class CommunityScenario:
    """Comments of one :class:`Community`, deterministic for a seed.

    Parameters
    ----------
    community : a :class:`Community` or its prefix (``"sq"``, ``"lc"``, ``"kc"``).
    seed : every random choice derives from it.
    notice_share : share of ham that is a member's notice with a link or a price.
    """

    def __init__(self, community, *, seed: int = 0, notice_share: float = 0.06):
        if isinstance(community, str):
            if community not in COMMUNITIES:
                raise ValueError(f"CommunityScenario: community must be one of {sorted(COMMUNITIES)}, got {community!r}")
            community = COMMUNITIES[community]
        if not isinstance(community, Community):
            raise ValueError(f"CommunityScenario: community must be a Community, got {community!r}")
        if isinstance(seed, bool) or not isinstance(seed, int):
            raise ValueError(f"CommunityScenario: seed must be an integer, got {seed!r}")
        if isinstance(notice_share, bool) or not isinstance(notice_share, (int, float)) or not 0 <= notice_share < 1:
            raise ValueError(f"CommunityScenario: notice_share must be in [0, 1), got {notice_share!r}")
        self.community = community
        self.seed = seed
        self.notice_share = notice_share

    def _rng(self, part: str) -> random.Random:
        return random.Random(f"community:{self.community.prefix}:{self.seed}:{part}")

    def _topic(self, rng: random.Random) -> str:
        return rng.choice(self.community.sections).replace("-", " ")

    def ordinary_text(self, rng: random.Random, section: str) -> str:
        """A member's ordinary comment: no link, no price, no offer."""
        c = self.community
        asides = [rng.choice(c.asides) for _ in range(rng.choice((0, 0, 1, 1, 2)))]
        parts = (rng.choice(_OPENERS), rng.choice(c.ordinary[section]), *asides, rng.choice(_CLOSERS))
        return _fill(" ".join(p for p in parts if p), rng, c.slots)

    def notice_text(self, rng: random.Random) -> str:
        """A member's own notice with a link or a price (ham that shares words with spam)."""
        c = self.community
        return _fill(rng.choice(c.notices), rng, c.slots, domain=c.domain)

    def spam_text(self, rng: random.Random) -> str:
        return _fill(rng.choice(_SPAM), rng, _SPAM_SLOTS, topic=self._topic(rng))

    def labelled(self, n: int, *, spam_share: float = 0.25) -> list[ScenarioComment]:
        """``n`` labelled comments: ordinary ham, members' notices and background spam."""
        _check_count("labelled", n)
        if isinstance(spam_share, bool) or not isinstance(spam_share, (int, float)) or not 0 < spam_share < 1:
            raise ValueError(f"CommunityScenario.labelled: spam_share must be in (0, 1), got {spam_share!r}")
        rng = self._rng("labelled")
        out = []
        for i in range(n):
            section = rng.choice(self.community.sections)
            cid = f"{self.community.prefix}-l{i:06d}"
            if rng.random() < spam_share:
                out.append(ScenarioComment(cid, self.spam_text(rng), section, f"user{rng.randrange(10_000, 99_999)}",
                                           float(i), 1, "spam"))
            elif rng.random() < self.notice_share:
                out.append(ScenarioComment(cid, self.notice_text(rng), section, self._member(rng), float(i), 0, "ham"))
            else:
                out.append(ScenarioComment(cid, self.ordinary_text(rng, section), section, self._member(rng),
                                           float(i), 0, "ham"))
        return out

    def ordinary(self, n: int) -> list[ScenarioComment]:
        """``n`` ordinary comments (ham without links, prices or offers)."""
        _check_count("ordinary", n)
        rng = self._rng("ordinary")
        out = []
        for i in range(n):
            section = rng.choice(self.community.sections)
            out.append(ScenarioComment(f"{self.community.prefix}-o{i:06d}", self.ordinary_text(rng, section),
                                       section, self._member(rng), float(i), 0, "ham"))
        return out

    def _member(self, rng: random.Random) -> str:
        return f"{rng.choice(self.community.slots['name']).lower()}{rng.randrange(1, 60)}"


def _check_count(op: str, n) -> None:
    if isinstance(n, bool) or not isinstance(n, int) or n < 1:
        raise ValueError(f"CommunityScenario.{op}: n must be an integer >= 1, got {n!r}")
