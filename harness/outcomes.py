"""Decision outcomes and verdicts, and how every screen shows them: the one place.

Why a module of its own, below every layer: the run decides (``harness.run.decisions``), the
store counts what did not pass, the reports, the line page and the console colour what was
decided.  Each reads the words, their order, their symbols and their tones from here, so a
new outcome or a changed colour is one edit, not five that drift apart.

A decision is on one measurement against its limit (ILAC-G8:09/2019 §4.2, guarded
acceptance, in our own words); a verdict is on a channel, a board or a run.  Every outcome
is shown as a word and a symbol as well as a tone, so it reads the same for colour-blind
readers and on a black-and-white printout.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal, get_args

Outcome = Literal["pass", "conditional pass", "conditional fail", "fail", "info", "not resolvable"]
#: Every decision outcome, best first.
OUTCOMES: tuple[Outcome, ...] = get_args(Outcome)
#: Outcomes every policy accepts: inside the limits by more than U, or no limit to decide.
ALWAYS_ACCEPTED: tuple[Outcome, ...] = ("pass", "info")

Verdict = Literal["PASS", "FAIL"]
#: The verdicts of a channel, a board or a run.
VERDICTS: tuple[Verdict, ...] = get_args(Verdict)
#: What a board's test on the line came to: its verdict, or aborted without one.
LineResult = Literal["PASS", "FAIL", "ABORTED"]

Tone = Literal["good", "doubt", "bad", "neutral", "unseen"]


@dataclass(frozen=True)
class Look:
    """How one outcome or verdict is shown: its symbol, its tone and the tone's colours."""

    word: str
    symbol: str
    tone: Tone

    @property
    def console_style(self) -> str:
        """The rich style of the tone (a console colour name, never markup)."""
        return CONSOLE_STYLES[self.tone]

    @property
    def console_banner(self) -> str:
        """The rich style of a large word on a filled background (the line's verdict)."""
        return CONSOLE_BANNERS[self.tone]

    @property
    def css_class(self) -> str:
        """The class the HTML pages style the tone with (see :data:`CSS_COLOURS`)."""
        return f"tone-{self.tone}"


#: tone -> rich style on the console.
CONSOLE_STYLES: dict[Tone, str] = {
    "good": "green",
    "doubt": "yellow",
    "bad": "bold red",
    "neutral": "cyan",
    "unseen": "magenta",
}
#: tone -> rich style of a large word on a filled background.
CONSOLE_BANNERS: dict[Tone, str] = {
    "good": "bold white on green",
    "doubt": "bold black on yellow",
    "bad": "bold white on red",
    "neutral": "bold white on blue",
    "unseen": "bold white on magenta",
}
#: tone -> colour on the HTML pages (dark enough on white for WCAG 2.1 contrast 4.5:1).
CSS_COLOURS: dict[Tone, str] = {
    "good": "#1b7a4c",
    "doubt": "#9a6700",
    "bad": "#b8410f",
    "neutral": "#3f4a5a",
    "unseen": "#8a2f8f",
}

LOOKS: dict[str, Look] = {
    "pass": Look("pass", "✓", "good"),
    "conditional pass": Look("conditional pass", "✓?", "doubt"),
    "conditional fail": Look("conditional fail", "✗?", "doubt"),
    "fail": Look("fail", "✗", "bad"),
    "info": Look("info", "i", "neutral"),
    "not resolvable": Look("not resolvable", "?", "unseen"),
    "PASS": Look("PASS", "✓", "good"),
    "FAIL": Look("FAIL", "✗", "bad"),
    "ABORTED": Look("ABORTED", "■", "unseen"),
}
#: Shown for a word that is neither an outcome nor a verdict (an older store's text).
UNKNOWN = Look("unknown", "•", "neutral")


def look(word: str | None) -> Look:
    """How ``word`` (a decision outcome or a verdict, any case for outcomes) is shown."""
    if word is None:
        return UNKNOWN
    return LOOKS.get(word) or LOOKS.get(word.lower()) or LOOKS.get(word.upper()) or UNKNOWN


def sql_list(words: tuple[str, ...]) -> str:
    """``('pass', 'info')`` as an SQL literal list; the words are this module's constants,
    never user text, so quoting them here is safe."""
    assert all("'" not in w for w in words)
    return "(" + ", ".join(f"'{w}'" for w in words) + ")"
