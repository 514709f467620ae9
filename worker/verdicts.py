"""The verdict record: one comment's score, action, reasons and the rule that decided.

One record for every path that judges a comment: the stream worker commits it
(:mod:`worker.commit`), the hold-queue re-score writes it again
(:mod:`ops.rescore`), and the RQ job returns it (:mod:`worker.jobs`).  The
field names a verdict carries in Redis and in JSON are spelled here.
"""
from __future__ import annotations

import json
from dataclasses import dataclass
from json.encoder import encode_basestring_ascii as _json_string

from model.actions import Action
from worker.routing import MODEL_RULE, Decision
from worker.validation import Comment


def format_reasons(reasons) -> str:
    """``[[token, contribution], ...]`` as compact JSON, contributions to 4 decimals.

    Built by hand because it runs once per comment on the hot path; the
    token goes through the json module's own string escaper, and NaN or an
    infinity (not JSON) is written as 0.

    Examples
    --------
    >>> format_reasons([("<url>", 0.123456), ("free", float("nan"))])
    '[["<url>",0.1235],["free",0.0]]'
    """
    if not reasons:
        return "[]"
    return "[" + ",".join([
        f"[{_json_string(str(t))},{c:.4f}]" if -1e300 < c < 1e300 else f"[{_json_string(str(t))},0.0]"
        for t, c in reasons
    ]) + "]"


@dataclass(frozen=True, slots=True)
class Verdict:
    """One judged comment, ready to write: the score to 4 decimals and the reasons already as JSON."""

    comment: Comment
    score: str
    action: Action
    reasons: str
    rule: str = MODEL_RULE
    campaign: str = ""

    @classmethod
    def of(cls, comment: Comment, score: float, decision: Decision, reasons) -> "Verdict":
        """The verdict of ``comment``: its score, the router's (or a policy's) decision, its ``(token, weight)`` reasons."""
        return cls(comment, f"{score:.4f}", decision.action, format_reasons(reasons), decision.rule,
                   decision.campaign)

    def as_fields(self, *, model: str, **extra: str) -> dict[str, str]:
        """The verdict-stream entry (``campaign`` only when there is one); ``extra`` fields go last."""
        c = self.comment
        out = {"id": c.id, "score": self.score, "action": str(self.action), "rule": self.rule, "model": model,
               "reasons": self.reasons, "site": c.site, "stream_id": c.stream_id}
        if self.campaign:
            out["campaign"] = self.campaign
        out.update(extra)
        return out

    def as_json(self, *, model: str) -> dict:
        """The verdict as plain JSON values (the RQ job's return value): score a float, reasons a list."""
        return {"id": self.comment.id, "score": float(self.score), "action": str(self.action), "rule": self.rule,
                "model": model, "reasons": json.loads(self.reasons), "site": self.comment.site}
