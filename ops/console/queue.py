"""The review queue's view: filters, near-duplicate families, highlighted text (no I/O).

The console reads held comments with :func:`worker.holdqueue.read_held`; this
module turns them into what the page shows:

* :func:`apply_filters` keeps the comments a moderator asked for (site,
  campaign or family, score range, words in the text);
* :class:`Families` groups near-duplicates: by the campaign the verdict named
  when the worker recorded one, else by MinHash over the model's normalized
  words (so look-alike letters, leetspeak and spacing cannot split a family),
  with LSH bands and a check of the estimated similarity;
* :class:`Highlighter` cuts a comment into segments marked spam-ward or
  ham-ward from the verdict's reasons, and shows invisible and direction
  control characters (a bidi override cannot reorder the page, and the
  moderator sees that the text carries one).

Everything here returns plain data; the template escapes every string.
"""
from __future__ import annotations

import re
import time
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field

import numpy as np
from markupsafe import Markup, escape

from model.minhash import EMPTY, MinHasher, band_hashes
from model.tokens import Tokenizer
from worker.holdqueue import HeldComment

PREVIEW_CHARS = 600
FAMILY_MIN_WORDS = 6
FAMILY_SIMILARITY = 0.5
FAMILY_PERM = 64
FAMILY_BANDS = 16
EXAMPLES = 3
REASONS_SHOWN = 6
_CACHE_MAX = 50_000

# Characters a moderator must see rather than have applied: bidi embeddings, overrides and
# isolates, marks, zero-width and other invisible format characters, and C0/C1 controls.
_HIDDEN = re.compile("[\u0000-\u0008\u000b\u000c\u000e-\u001f\u007f-\u009f\u00ad\u061c\u180e"
                     "\u200b-\u200f\u202a-\u202e\u2060-\u2064\u2066-\u206f\ufeff\ufff9-\ufffb]")
_CHUNKS = re.compile(r"(\s+)")


@dataclass(frozen=True, slots=True)
class Segment:
    """A piece of a comment's text: ``kind`` is "" (plain), "spam", "ham" or "ctl" (a shown control)."""

    text: str
    kind: str = ""
    weight: float = 0.0


@dataclass(frozen=True)
class Filters:
    """What the moderator asked to see; ``None`` / "" means no restriction."""

    site: str = ""
    group: str = ""
    min_score: float | None = None
    max_score: float | None = None
    contains: str = ""

    @property
    def active(self) -> bool:
        return bool(self.site or self.group or self.contains or self.min_score is not None
                    or self.max_score is not None)


def parse_filters(params) -> Filters:
    """Filters from query parameters (a mapping of strings); bad numbers are ignored (pure)."""
    def number(name):
        raw = (params.get(name) or "").strip()
        try:
            value = float(raw)
        except ValueError:
            return None
        return value if 0.0 <= value <= 1.0 else None

    return Filters(site=(params.get("site") or "").strip()[:256], group=(params.get("group") or "").strip()[:64],
                   min_score=number("min"), max_score=number("max"),
                   contains=(params.get("q") or "").strip()[:200])


def apply_filters(comments: Iterable[HeldComment], filters: Filters, group_of: dict[str, str]) -> list[HeldComment]:
    """The comments that pass every filter, in their order (pure).

    ``group_of`` maps comment id -> family or campaign key (see :class:`Families`).
    """
    needle = filters.contains.casefold()
    out = []
    for c in comments:
        if filters.site and c.site != filters.site:
            continue
        if filters.group and group_of.get(c.id) != filters.group and c.campaign != filters.group:
            continue
        if filters.min_score is not None and (c.score is None or c.score < filters.min_score):
            continue
        if filters.max_score is not None and (c.score is None or c.score > filters.max_score):
            continue
        if needle and (c.text is None or needle not in c.text.casefold()):
            continue
        out.append(c)
    return out


# -- families ------------------------------------------------------------------------


@dataclass
class Group:
    """A row of the grouped queue: one campaign or near-duplicate family (or one lone comment)."""

    key: str
    kind: str  # "campaign", "family" or "single"
    members: list[HeldComment] = field(default_factory=list)

    @property
    def size(self) -> int:
        return len(self.members)

    @property
    def ids(self) -> list[str]:
        return [c.id for c in self.members]

    @property
    def newest(self) -> float:
        return max(c.held_at for c in self.members)

    @property
    def sites(self) -> list[str]:
        return sorted({c.site for c in self.members})

    @property
    def authors(self) -> int:
        return len({c.author or c.id for c in self.members})

    def score_range(self) -> tuple[float, float] | None:
        scores = [c.score for c in self.members if c.score is not None]
        return (min(scores), max(scores)) if scores else None


class Families:
    """Near-duplicate families among held comments, with a bounded per-comment signature cache.

    One instance lives as long as the console process; a comment's text
    never changes, so its signature is computed once.
    """

    def __init__(self, *, tokenizer: Tokenizer | None = None, num_perm: int = FAMILY_PERM, bands: int = FAMILY_BANDS,
                 similarity: float = FAMILY_SIMILARITY, min_words: int = FAMILY_MIN_WORDS):
        tokenizer = tokenizer or Tokenizer()
        self.hasher = MinHasher(num_perm=num_perm, shingle=3, seed=0, words=tokenizer.words)
        self.bands = bands
        self.similarity = similarity
        self.min_words = min_words
        self._signatures: dict[str, np.ndarray | None] = {}

    def _signatures_of(self, comments: Sequence[HeldComment]) -> list[np.ndarray | None]:
        missing = [c for c in comments if c.id not in self._signatures]
        if missing:
            if len(self._signatures) + len(missing) > _CACHE_MAX:
                self._signatures.clear()
            words = [self.hasher.words(c.text or "") for c in missing]
            sigs = self.hasher.signatures_of_words(words)
            for c, w, sig in zip(missing, words, sigs):
                self._signatures[c.id] = sig if len(w) >= self.min_words and not (sig == EMPTY).all() else None
        return [self._signatures.get(c.id) for c in comments]

    def group_of(self, comments: Sequence[HeldComment]) -> dict[str, str]:
        """comment id -> group key: ``campaign:<id>`` when the verdict named one, ``family:<id>`` for
        near-duplicates (keyed by the family's oldest member), absent for a lone comment."""
        out: dict[str, str] = {}
        rest = []
        for c in comments:
            if c.campaign:
                out[c.id] = f"campaign:{c.campaign}"
            else:
                rest.append(c)
        sigs = self._signatures_of(rest)
        usable = [(c, s) for c, s in zip(rest, sigs) if s is not None]
        if len(usable) < 2:
            return out
        matrix = np.stack([s for _, s in usable])
        keys = band_hashes(matrix, self.bands)
        parent = list(range(len(usable)))

        def find(i: int) -> int:
            while parent[i] != i:
                parent[i] = parent[parent[i]]
                i = parent[i]
            return i

        # candidate pairs: each comment with the first comment seen in each of its LSH buckets,
        # then one vectorised similarity check of every pair
        first_in_bucket: dict[int, int] = {}
        pairs = set()
        for i, row in enumerate(keys.tolist()):
            for key in row:
                j = first_in_bucket.setdefault(key, i)
                if j != i:
                    pairs.add((j, i))
        if pairs:
            left, right = np.array(sorted(pairs)).T
            similar = (matrix[left] == matrix[right]).mean(axis=1) >= self.similarity
            for i, j in zip(left[similar].tolist(), right[similar].tolist()):
                root_i, root_j = find(i), find(j)
                if root_i != root_j:
                    parent[root_j] = root_i
        members: dict[int, list[int]] = {}
        for i in range(len(usable)):
            members.setdefault(find(i), []).append(i)
        for group in members.values():
            if len(group) < 2:
                continue
            oldest = min((usable[i][0] for i in group), key=lambda c: (c.held_at, c.id))
            for i in group:
                out[usable[i][0].id] = f"family:{oldest.id}"
        return out


def group_rows(comments: Sequence[HeldComment], group_of: dict[str, str]) -> list[Group]:
    """Campaigns and families as one row each (biggest first, then newest), lone comments after them (pure)."""
    groups: dict[str, Group] = {}
    singles = []
    for c in comments:
        key = group_of.get(c.id)
        if key is None:
            singles.append(Group(key=c.id, kind="single", members=[c]))
            continue
        g = groups.get(key)
        if g is None:
            g = groups[key] = Group(key=key, kind=key.partition(":")[0], members=[])
        g.members.append(c)
    multi = sorted(groups.values(), key=lambda g: (-g.size, -g.newest, g.key))
    # a campaign or family with one member left in view is a lone comment
    rows = [g for g in multi if g.size > 1]
    rows += [Group(key=g.members[0].id, kind="single", members=g.members) for g in multi if g.size == 1]
    rows += singles
    return rows


# -- highlighting ---------------------------------------------------------------------


class Highlighter:
    """Marks the words behind a verdict's reasons in the original text.

    A whitespace chunk of the text is marked when the tokens the model's
    tokenizer makes of it carry reasons (a word pair's weight goes to both of
    its chunks); the sign of the summed weight picks spam-ward or ham-ward.
    Rules that look across chunks (spaced-out letters) are not traced back to
    the text; their tokens still show in the reasons list.
    """

    def __init__(self, *, tokenizer: Tokenizer | None = None, preview_chars: int = PREVIEW_CHARS):
        self.tokenizer = tokenizer or Tokenizer()
        self.preview_chars = preview_chars
        self._chunks: dict[str, tuple[str, ...]] = {}

    def _tokens(self, chunk: str) -> tuple[str, ...]:
        found = self._chunks.get(chunk)
        if found is None:
            if len(self._chunks) >= _CACHE_MAX:
                self._chunks.clear()
            found = self._chunks[chunk] = tuple(self.tokenizer.chunk_entry(chunk)[0])
        return found

    def segments(self, text: str, reasons: Sequence[tuple[str, float]]) -> list[Segment]:
        """The text (cut to the preview length by the caller if wanted) as marked segments."""
        if not text:
            return []
        weights = {}
        for token, weight in reasons:
            weights[token] = weights.get(token, 0.0) + weight
        parts = _CHUNKS.split(text)
        marks = [0.0] * len(parts)
        if weights:
            # only chunks holding a reason's word can be marked; a pair needs both of its words
            words = set(weights)
            words.update(w for token in weights if "_" in token for w in token.split("_"))
            tokens = self._tokens
            chunks = [(i, tokens(parts[i])) for i in range(0, len(parts), 2) if parts[i]]
            for n, (i, toks) in enumerate(chunks):
                if words.isdisjoint(toks):
                    continue
                following = None
                for k, token in enumerate(toks):
                    if token not in words:
                        continue
                    marks[i] += weights.get(token, 0.0)
                    if k + 1 < len(toks):
                        nxt, where = toks[k + 1], i
                    else:
                        if following is None:
                            following = next(((j, t) for j, t in chunks[n + 1:] if t), (None, ()))
                        where, nxt = following[0], (following[1][0] if following[1] else None)
                    pair = f"{token}_{nxt}" if nxt is not None else None
                    if pair in weights:
                        marks[i] += weights[pair]
                        marks[where] += weights[pair]
        show = _shown if _HIDDEN.search(text) else _plain
        out: list[Segment] = []
        plain: list[str] = []
        for part, weight in zip(parts, marks):
            if weight:
                if plain:
                    out.extend(show("".join(plain), ""))
                    plain = []
                out.extend(show(part, "spam" if weight > 0 else "ham", weight))
            else:
                plain.append(part)
        if plain:
            out.extend(show("".join(plain), ""))
        return out


def _plain(text: str, kind: str, weight: float = 0.0) -> tuple[Segment]:
    return (Segment(text, kind, weight),)


def _shown(text: str, kind: str, weight: float = 0.0) -> list[Segment]:
    """Split out hidden characters as visible ``ctl`` segments naming their code point."""
    if not _HIDDEN.search(text):
        return [Segment(text, kind, weight)]
    out = []
    pos = 0
    for m in _HIDDEN.finditer(text):
        if m.start() > pos:
            out.append(Segment(text[pos:m.start()], kind, weight))
        out.append(Segment(f"U+{ord(m.group()):04X}", "ctl"))
        pos = m.end()
    if pos < len(text):
        out.append(Segment(text[pos:], kind, weight))
    return out


def visible(text: str) -> list[Segment]:
    """A whole text with its hidden characters shown, nothing marked (for the full view of a long comment)."""
    return _shown(text, "") if text else []


# -- a comment's body as HTML ----------------------------------------------------------------

def _segments_html(segments: Sequence[Segment], *, marks: bool) -> str:
    out = []
    for s in segments:
        text = escape(s.text)
        if s.kind == "ctl":
            out.append(f'<span class="ctl" title="hidden control character">{text}</span>')
        elif s.kind and marks:
            out.append(f'<mark class="w-{s.kind}" title="{s.weight:+.2f} toward {s.kind}">{text}</mark>')
        else:
            out.append(str(text))
    return "".join(out)


def render_body(*, segments: Sequence[Segment] | None, full: Sequence[Segment] | None,
                reasons: Sequence[tuple[str, float]], chars: int) -> Markup:
    """A comment's text (highlighted), its full text when long, and its reasons, as escaped HTML.

    Every piece of comment text goes through :func:`markupsafe.escape`, the
    escaper Jinja2's autoescape uses; this runs once per comment and is kept,
    so a 500-row page is not 20,000 template calls.  ``segments=None`` means
    the text is no longer cached.
    """
    if segments is None:
        html = ('<p class="text expired">The text is no longer cached (its cache entry expired); '
                "the decision still works.</p>")
    else:
        html = f'<p class="text" dir="auto">{_segments_html(segments, marks=True)}'
        if full is not None:
            html += ('<span class="cut">…</span></p><details class="full"><summary>Show all '
                     f'{chars:,} characters</summary><p class="text" dir="auto">'
                     f"{_segments_html(full, marks=False)}</p></details>")
        else:
            html += "</p>"
    if reasons:
        chips = "".join(f'<li class="w-{"spam" if w > 0 else "ham"}"><bdi>{escape(t)}</bdi> <b>{w:+.2f}</b></li>'
                        for t, w in reasons)
        html += f'<ul class="why" aria-label="tokens that drove the score">{chips}</ul>'
    return Markup(html)


# -- small formatting helpers ------------------------------------------------------------


def infer_rule(comment: HeldComment, *, model_hold: float | None, site_hold: float | None,
               campaign: str | None = None) -> str:
    """The rule that held a comment: the verdict's own ``rule`` when the worker recorded one, else inferred.

    Inferred for workers that do not record it, from the thresholds the
    console shares with them (its config's ``worker.site_thresholds`` and the
    registry's record of the scoring model): a campaign named by the verdict,
    or an active campaign whose first member is in the comment's family, gives
    ``campaign``; a score at or above the model's hold threshold ``model``; at
    or above the site's own ``site``; held below both, only the campaign
    policy holds a comment, so ``campaign``.  No score: ``unknown``.
    """
    if comment.rule:
        return comment.rule
    if comment.campaign or campaign:
        return "campaign"
    if comment.score is None:
        return "unknown"
    if model_hold is not None and comment.score >= model_hold:
        return "model"
    if site_hold is not None and comment.score >= site_hold:
        return "site"
    return "model" if model_hold is None and site_hold is None else "campaign"


def campaigns_by_family(group_of: dict[str, str], campaigns: dict[str, dict]) -> dict[str, str]:
    """family key -> active campaign id, for families that hold a campaign's first member (pure)."""
    out = {}
    for cid, data in campaigns.items():
        family = group_of.get(str(data.get("example_id", "")))
        if family is not None and family.startswith("family:"):
            out.setdefault(family, cid)
    return out


def group_label(group: Group, campaign: str | None = None) -> str:
    """How a campaign or family is named in the filter list (pure)."""
    if group.kind == "campaign" or campaign:
        return f"campaign {campaign or group.key.partition(':')[2]} · {group.size} comments"
    example = next((c.text for c in group.members if c.text), "") or ""
    example = " ".join(example.split())
    return f"family of {group.size} · “{example[:40]}{'…' if len(example) > 40 else ''}”"


def utc(ts: float | None) -> str:
    if not ts:
        return ""
    return time.strftime("%Y-%m-%d %H:%M:%S UTC", time.gmtime(ts))
