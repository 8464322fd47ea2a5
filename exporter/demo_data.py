"""Invented demo data: help-desk messages to "Spokewright Commons".

Spokewright Commons is a fictional community bike-share and tool library; every message here
is made up from templates and slot fillers for the `textsieve demo` walk-through. This is NOT
test reference data: tests that need real data use the published sets under tests/data/.

Each message gets one of four labels:

- ``billing``: money taken wrongly (double charges, fees, refunds);
- ``repair``: a bike, dock or borrowed tool is broken;
- ``account``: logging in, membership cards, profiles;
- ``praise``: nothing to fix, the member says thanks.

The label follows a rule (below) except for ``DISAGREEMENT`` (5 %) of messages, whose label
was flipped to another one, as when two people sort the same inbox differently. About a
fifth of the messages can only be
read by word order: "The chain is not broken, but I was charged twice." is billing while
"The chain is broken, but I was not charged twice." is repair, with the very same bag of
words. Others need the contrast read right: "it worked fine until my account got locked" is
account, "the chain snapped last week, but you fixed it straight away. Thanks!" is praise.
The rule throughout: the label is the problem the member still has; when none is left and
thanks are given, it is praise. Measured without the disagreement (seed 7, 6,000 messages): a
unigram bag-of-words logistic regression scored about 0.90 in 5-fold cross-validation and a
unigram+bigram one 1.00, so the data is learnable, but only with word order.
"""

from __future__ import annotations

import json
import random
import re
from dataclasses import dataclass
from pathlib import Path

from textsieve.files import atomic_write_text
from textsieve.registry.tokenizer import Tokenizer

LABELS: tuple[str, ...] = ("billing", "repair", "account", "praise")
_PROBLEM_LABELS: tuple[str, ...] = ("billing", "repair", "account")
MIN_TOKENS = 5
MAX_TOKENS = 60
SPLIT_NAMES: tuple[str, ...] = ("train", "valid", "test")
# Without it the demo model is right on every validation text and calibration has nothing to
# show; real labelled inboxes carry a few percent of such disagreement.
DISAGREEMENT = 0.05

# Words and single punctuation marks: the measure the length bounds above are stated in.
_TOKEN = re.compile(r"\w+|[^\w\s]")


@dataclass(frozen=True)
class _Clause:
    """A statement that can be said as it is or negated: subject, copula, state."""

    subject: str
    copula: str
    state: str
    event: str = ""  # the same thing told as something that happened ("until ...")

    def say(self, negated: bool = False, contracted: bool = False) -> str:
        if not negated:
            return f"{self.subject} {self.copula} {self.state}"
        verb = f"{self.copula}n't" if contracted and self.copula != "am" else f"{self.copula} not"
        return f"{self.subject} {verb} {self.state}"


_BIKES = (
    "bike #{num}",
    "the blue cargo bike",
    "the tandem",
    "my usual e-bike",
    "the kids' trailer bike",
    "the folding bike",
    "my 自転車",
)
_TOOLS = (
    "drill",
    "hedge trimmer",
    "pressure washer",
    "tile cutter",
    "sewing machine",
    "ladder",
    "jigsaw",
    "lawn aerator",
)
_PLACES = (
    "Riverside",
    "Market Square",
    "Hauptstraße",
    "Café Tisserène",
    "Old Mill",
    "Østre Park",
    "Library Lane",
    "Station Road",
)
_NAMES = ("Zoë", "José", "Jürgen", "Renée", "Søren", "Priya", "Tom", "Ana", "美咲", "Kwame")
_DAYS = ("Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday", "Sunday")

_PROBLEMS: dict[str, tuple[_Clause, ...]] = {
    "billing": (
        _Clause("I", "was", "charged twice for one ride", "I got charged twice for one ride"),
        _Clause("a late fee", "was", "added to my statement", "a late fee appeared on my statement"),
        _Clause("my card", "was", "billed after I cancelled", "my card got billed after I cancelled"),
        _Clause(
            "the weekend rate", "was", "applied to a weekday loan", "the weekend rate got applied to a weekday loan"
        ),
        _Clause("the membership fee", "was", "taken twice this month", "the membership fee was taken twice this month"),
        _Clause("I", "was", "billed €{amt} for a free workshop", "I got billed €{amt} for a free workshop"),
        _Clause("my invoice", "is", "higher than the posted price", "my invoice came out higher than the posted price"),
        _Clause("the deposit for the {tool}", "was", "kept", "the deposit for the {tool} was kept"),
    ),
    "repair": (
        _Clause("the chain on {bike}", "is", "broken", "the chain on {bike} snapped"),
        _Clause("the brakes on {bike}", "are", "squealing", "the brakes on {bike} started squealing"),
        _Clause("the front tyre", "is", "flat", "the front tyre went flat"),
        _Clause("the e-bike battery", "is", "dead", "the e-bike battery died"),
        _Clause("the {tool} I borrowed", "is", "broken", "the {tool} I borrowed broke"),
        _Clause("the dock lock at {place}", "is", "jammed", "the dock lock at {place} jammed"),
        _Clause("the gears", "are", "slipping", "the gears started slipping"),
        _Clause("the seat post", "is", "stuck", "the seat post got stuck"),
        _Clause("the rear light", "is", "flickering", "the rear light started flickering"),
    ),
    "account": (
        _Clause("my account", "is", "locked", "my account got locked"),
        _Clause("the password reset link", "is", "expired", "the password reset link expired"),
        _Clause("my membership card", "is", "deactivated", "my membership card got deactivated"),
        _Clause("my email address", "is", "wrong in the app", "my email address reverted to an old one"),
        _Clause("the app", "is", "logging me out", "the app started logging me out"),
        _Clause("my profile", "is", "showing someone else's name", "my profile started showing someone else's name"),
        _Clause("my login", "is", "rejected", "my login got rejected"),
        _Clause("I", "am", "locked out of the member portal", "I got locked out of the member portal"),
    ),
}

_PRAISE: tuple[_Clause, ...] = (
    _Clause("the volunteers at {place}", "were", "wonderful"),
    _Clause("the mechanic", "was", "quick and friendly"),
    _Clause("the new cargo bikes", "are", "a joy to ride"),
    _Clause("the tool library", "is", "a real gem"),
    _Clause("your help desk", "was", "patient with me"),
    _Clause("the repair workshop", "was", "brilliant"),
    _Clause("{name} at the front desk", "was", "so helpful"),
    _Clause("the {tool}", "was", "in perfect shape"),
)

_FIXES = (
    "your team sorted it out in ten minutes",
    "{name} put it right the same afternoon",
    "the help desk had it dealt with by {day}",
    "you fixed it straight away",
    "it was all put right within a day",
)
_THANKS = (
    "thank you so much",
    "thanks a lot",
    "just wanted to say thanks",
    "you made my week",
    "keep up the great work",
    "merci beaucoup",
    "danke schön",
    "谢谢",
)
_GRATEFUL = ("thanks for", "thank you for", "I appreciated", "I was grateful for")
_REQUESTS = {
    "billing": (
        "Could you check my statement?",
        "Please refund the difference.",
        "Can I get that money back?",
        "Please correct the charge.",
    ),
    "repair": (
        "Can someone take a look?",
        "Please send a mechanic.",
        "It needs fixing before the weekend.",
        "Could it be repaired soon?",
    ),
    "account": (
        "Please help me get back in.",
        "Can you reset it?",
        "I need access before Saturday.",
        "Could you sort out my login?",
    ),
}
_OPENERS = (
    "",
    "",
    "",
    "Hi,",
    "Hello team,",
    "Good morning,",
    "Hey there,",
    "Dear Spokewright Commons,",
    "Quick one:",
    "Hi folks,",
)
_CONTEXT = (
    "I have been a member since {year}.",
    "I borrowed the {tool} on {day}.",
    "I rode {bike} from the {place} dock on {day}.",
    "My member number is {num}.",
    "This is about last {day}.",
    "I use the app on my phone.",
    "I am writing for my whole household.",
    "I picked it up at {place}.",
)
_SIGNOFFS = ("", "", "", "Thanks, {name}", "Cheers, {name}", "Best, {name}", "— {name}", "Thanks in advance.")
_EMOJI = ("🙂", "🚲", "🔧", "😕", "👍", "❤️", "💸", "🔒")
_CONNECTIVES = (", but", " and", "; however,", ". Also,")


def _fill(rng: random.Random, template: str) -> str:
    # Only the slots a template names are drawn, so adding a slot never shifts other draws.
    values = {
        "bike": lambda: rng.choice(_BIKES).replace("{num}", str(rng.randint(100, 999))),
        "tool": lambda: rng.choice(_TOOLS),
        "place": lambda: rng.choice(_PLACES),
        "name": lambda: rng.choice(_NAMES),
        "day": lambda: rng.choice(_DAYS),
        "num": lambda: str(rng.randint(10000, 99999)),
        "year": lambda: str(rng.randint(2012, 2024)),
        "amt": lambda: f"{rng.randint(3, 40)}.{rng.choice(('00', '50', '90'))}",
    }
    return re.sub(r"\{(\w+)\}", lambda m: values[m.group(1)](), template)


def _sentence(text: str) -> str:
    return text[:1].upper() + text[1:]


def _plain(rng: random.Random, label: str) -> list[str]:
    if label == "praise":
        parts = [f"{_sentence(rng.choice(_PRAISE).say())}!", _sentence(rng.choice(_THANKS)) + "."]
        return parts if rng.random() < 0.7 else parts[::-1]
    clause = rng.choice(_PROBLEMS[label])
    parts = [_sentence(clause.say()) + "."]
    if rng.random() < 0.6:
        parts.append(rng.choice(_REQUESTS[label]))
    return parts


def _swap(rng: random.Random, label: str) -> list[str]:
    """One clause affirmed, another negated: the affirmed one names the label."""
    others = [x for x in LABELS if x != label]
    other = rng.choice(others)
    pool = {**_PROBLEMS, "praise": _PRAISE}
    kept, denied = rng.choice(pool[label]), rng.choice(pool[other])
    contracted = rng.random() < 0.25
    said, unsaid = kept.say(), denied.say(negated=True, contracted=contracted)
    first, second = (unsaid, said) if rng.random() < 0.5 else (said, unsaid)
    return [_sentence(f"{first}{rng.choice(_CONNECTIVES)} {second}.")]


def _until(rng: random.Random, label: str) -> list[str]:
    """A problem that came after a good start: the later event names the label."""
    clause = rng.choice(_PROBLEMS[label])
    start = rng.choice(("everything was fine", "it worked fine", "all was well", "I was happy with the service"))
    return [_sentence(f"{start} until {clause.event}.")]


def _thanks_but(rng: random.Random, label: str) -> list[str]:
    """Polite thanks first, then the problem that is still open."""
    clause = rng.choice(_PROBLEMS[label])
    grateful = rng.choice(_GRATEFUL)
    return [_sentence(f"{grateful} the quick reply last time, but {clause.say()} again.")]


def _nothing_wrong(rng: random.Random, label: str) -> list[str]:
    """Praise that mentions problems only to deny them."""
    a, b = rng.sample(_PROBLEM_LABELS, 2)
    first = rng.choice(_PROBLEMS[a]).say(negated=True)
    second = rng.choice(_PROBLEMS[b]).say(negated=True)
    return [
        _sentence(f"nothing is wrong: {first} and {second}."),
        _sentence(f"{rng.choice(_THANKS)}, {rng.choice(_PRAISE).say()}!"),
    ]


def _fixed(rng: random.Random, label: str) -> list[str]:
    """A past problem that has been put right: praise, though the problem words are there."""
    clause = rng.choice(_PROBLEMS[rng.choice(_PROBLEM_LABELS)])
    return [_sentence(f"{clause.event} last week, but {rng.choice(_FIXES)}."), _sentence(rng.choice(_THANKS)) + "!"]


_FAMILIES = {
    "problem": ((_plain, 0.60), (_swap, 0.22), (_until, 0.12), (_thanks_but, 0.06)),
    "praise": ((_plain, 0.50), (_swap, 0.22), (_nothing_wrong, 0.14), (_fixed, 0.14)),
}


def _message(rng: random.Random, label: str) -> str:
    families = _FAMILIES["praise" if label == "praise" else "problem"]
    family = rng.choices([f for f, _ in families], weights=[w for _, w in families])[0]
    parts = family(rng, label)
    if rng.random() < 0.12:
        return _fill(rng, " ".join(parts))  # terse: the message and nothing else
    context = rng.random()
    if context < 0.45:
        parts[:0] = rng.sample(_CONTEXT, 2 if context < 0.15 else 1)
    opener, signoff = rng.choice(_OPENERS), rng.choice(_SIGNOFFS)
    text = " ".join(p for p in (opener, *parts, signoff) if p)
    text = _fill(rng, text)
    style = rng.random()
    if style < 0.12:
        text = text.lower()  # members typing in a hurry
    elif style < 0.16:
        text = text.rstrip(".!") + "!!"
    if rng.random() < 0.07:
        text = f"{text} {rng.choice(_EMOJI)}"
    return text


def token_count(text: str) -> int:
    """Words and punctuation marks in ``text``: the unit of MIN_TOKENS and MAX_TOKENS."""
    return len(_TOKEN.findall(text))


def generate(n: int = 6000, seed: int = 7, disagreement: float = DISAGREEMENT) -> list[dict[str, str]]:
    """``n`` distinct invented messages as ``{"text", "label"}``; the same seed gives the same list.

    ``disagreement`` is the share of messages whose recorded label is another one, as when
    two people sorting the same inbox disagree; it does not change the texts.
    """
    if isinstance(n, bool) or not isinstance(n, int) or n < 1:
        raise ValueError(f"n must be a positive whole number of examples, got {n!r}")
    if not 0 <= disagreement < 1:
        raise ValueError(f"disagreement must be at least 0 and below 1, got {disagreement!r}")
    rng = random.Random(seed)
    flips = random.Random(f"disagreement-{seed}")
    seen: dict[str, str] = {}
    # Distinct as the model reads them: a message and its lower-cased copy are one input, which a
    # split would put on both sides (36 of the 6,000 did: copies of training rows in valid and test).
    split = Tokenizer().split
    inputs: set[tuple[str, ...]] = set()
    # Bounded so a future template change that runs out of distinct texts fails loudly.
    for _ in range(n * 50):
        if len(seen) == n:
            break
        label = rng.choice(LABELS)
        text = _message(rng, label)
        if not MIN_TOKENS <= token_count(text) <= MAX_TOKENS:
            continue
        tokens = tuple(split(text)[0])
        if tokens not in inputs:
            inputs.add(tokens)
            seen[text] = label
    else:
        if len(seen) < n:
            raise RuntimeError(f"templates gave only {len(seen)} distinct messages, {n} asked for")
    rows = []
    for text, label in seen.items():
        if flips.random() < disagreement:
            label = flips.choice([x for x in LABELS if x != label])
        rows.append({"text": text, "label": label})
    return rows


def _write_jsonl_atomic(path: Path, rows: list[dict[str, str]]) -> None:
    atomic_write_text(path, "".join(json.dumps(row, ensure_ascii=False) + "\n" for row in rows))


def write_splits(out_dir: Path, n: int = 6000, seed: int = 7) -> dict[str, Path]:
    """Write train/valid/test JSONL (80/10/10) under ``out_dir``; return the paths by split name."""
    if isinstance(n, bool) or not isinstance(n, int) or n < 10:
        raise ValueError(f"n must be a whole number of at least 10 (one per split), got {n!r}")
    rows = generate(n, seed)
    n_train, n_valid = n * 8 // 10, n // 10
    chunks = (rows[:n_train], rows[n_train : n_train + n_valid], rows[n_train + n_valid :])
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    paths: dict[str, Path] = {}
    for name, chunk in zip(SPLIT_NAMES, chunks, strict=True):
        paths[name] = out_dir / f"{name}.jsonl"
        _write_jsonl_atomic(paths[name], chunk)
    return paths
