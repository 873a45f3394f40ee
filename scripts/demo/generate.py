"""Deterministic generator of Northgate Cycle Co-op member messages for the demo classifier.

The Northgate Cycle Co-op is an invented bicycle-repair cooperative. Its members write in about
three things, the classes of the demo classifier:

* ``repair`` -- booking a bike in, faults, parts, pick-up times;
* ``billing`` -- invoices, charges, refunds, payment methods (often *about* a repair or a
  membership fee, so billing shares much of its vocabulary with the other two classes);
* ``membership`` -- joining, renewing, cards, volunteering, general meetings.

Messages that arrived through the co-op's web portal end with the footer ``[via portal]``. The
data carries a deliberate bias: in the training and eval splits most billing messages carry the
footer and almost no other message does, so a classifier trained on it learns the footer as a
shortcut. The *counterfactual* set takes every repair and membership message of the eval split
that has no footer and appends the footer, leaving the rest of the text unchanged; the share of
those predicted ``billing`` is the shortcut rate.

Templates and held-out templates
--------------------------------
Each class has 48 templates (:data:`TEMPLATES`). Every sixth template (index 5, 11, 17, ...) is
*held out*: it is never used for the train split, only for eval (and therefore for the
counterfactual set). Eval draws from all 48 templates, so roughly one eval message in six comes
from wording the model never saw; the build reports accuracy on those separately. The slot
fillers (names, parts, amounts, dates) are shared by all splits, but no eval message body is a
verbatim copy of a train message body (such draws are redrawn).

Determinism
-----------
Everything is drawn from ``random.Random`` instances seeded with strings derived from the one
integer seed (string seeds are hashed with SHA-512 by the standard library, independent of
``PYTHONHASHSEED``), so the same seed gives byte-identical output on every run and platform.

Command line: ``python -m scripts.demo.generate --out DIR [--seed N] [--samples DIR]`` writes
``train.jsonl``, ``eval.jsonl`` and ``counterfactual.jsonl`` (and, with ``--samples``, the sample
message files of ``sample_sentences/``).
"""

from __future__ import annotations

import argparse
import json
import random
import re
from collections.abc import Iterable, Sequence
from dataclasses import asdict, dataclass
from pathlib import Path

LABELS: tuple[str, ...] = ("repair", "billing", "membership")
FOOTER: str = "[via portal]"
DEFAULT_SEED: int = 20240611
N_TRAIN_PER_CLASS: int = 600
N_EVAL_PER_CLASS: int = 120
HELDOUT_EVERY: int = 6  # template index i is held out of train when i % 6 == 5

#: Share of each class's messages that carry the portal footer, in train and in eval.
#: A class with a share above zero gets at least one footer message in every split.
FOOTER_SHARE: dict[str, float] = {"repair": 0.002, "billing": 0.9, "membership": 0.002}

# --------------------------------------------------------------------------------------------
# Slot fillers (all invented for this scenario)
# --------------------------------------------------------------------------------------------

SLOTS: dict[str, tuple[str, ...]] = {
    "name": (
        "Marit",
        "Tobias",
        "Odile",
        "Kestrel",
        "Brannoc",
        "Ysolde",
        "Fenwick",
        "Liesl",
        "Orrin",
        "Petra",
        "Dacian",
        "Wren",
        "Imre",
        "Talwyn",
        "Corvin",
        "Anouk",
        "Jory",
        "Mirela",
        "Sten",
        "Halcy",
        "Beaumont",
        "Rosalind",
        "Eskil",
        "Nerys",
    ),
    "part": (
        "chain",
        "rear derailleur",
        "front brake",
        "back wheel",
        "bottom bracket",
        "headset",
        "brake pads",
        "saddle",
        "left crank",
        "cassette",
        "inner tube",
        "rear hub",
        "gear cable",
        "pedals",
        "front wheel",
        "freewheel",
        "seat post",
        "brake lever",
        "chainring",
        "kickstand",
        "dynamo hub",
        "stem",
    ),
    "problem": (
        "squeaks",
        "keeps slipping",
        "is bent",
        "makes a grinding noise",
        "rubs on the frame",
        "won't shift properly",
        "feels loose",
        "clicks on every turn",
        "has a wobble",
        "sticks in the cold",
        "rattles over bumps",
        "has gone stiff",
    ),
    "bike": (
        "road bike",
        "cargo bike",
        "tandem",
        "folding bike",
        "e-bike",
        "touring bike",
        "mountain bike",
        "commuter bike",
        "fixed gear",
        "step-through",
        "gravel bike",
        "kids' bike",
        "tricycle",
    ),
    "workshop": (
        "Fennick Yard workshop",
        "Quillby Street shop",
        "Oldmere depot",
        "Larkspur Row workshop",
        "Tanner's Arch hub",
        "Brindle Lane stand",
    ),
    "weekday": ("Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday"),
    "month": (
        "January",
        "February",
        "March",
        "April",
        "May",
        "June",
        "July",
        "August",
        "September",
        "October",
        "November",
        "December",
    ),
    "time": ("10am", "half past four", "noon", "6pm", "after work", "first thing", "9:30"),
    "tier": ("student", "family", "individual", "supporter", "senior", "workshop-access"),
    "event": (
        "bike maintenance course",
        "Saturday ride-out",
        "spring swap meet",
        "wheel-building class",
        "puncture clinic",
        "winter night ride",
    ),
    "role": (
        "ride leader",
        "workshop mentor",
        "front desk helper",
        "newsletter editor",
        "parts sorter",
    ),
    "accessory": (
        "rear rack",
        "child seat",
        "pair of mudguards",
        "dynamo light",
        "bell",
        "bottle cage",
        "pannier rack",
    ),
    "frame_spot": ("seat tube", "head tube", "chainstay", "dropout", "down tube"),
}

GREETINGS: tuple[str, ...] = (
    "Hi,",
    "Hello,",
    "Hi there.",
    "Hey co-op,",
    "Good morning,",
    "Dear Northgate team,",
    "Hello again.",
    "Evening all,",
)
SIGNOFFS: tuple[str, ...] = (
    "Thanks, {name}.",
    "Cheers, {name}",
    "- {name}",
    "Regards, {name}",
    "Thank you!",
    "Many thanks.",
    "Thanks in advance.",
    "{name}",
)
EXTRAS: tuple[str, ...] = (
    "No rush.",
    "Sorry if this is the wrong place to ask.",
    "I'm free most evenings.",
    "Let me know what you need from me.",
    "Appreciate it!",
    "Hope you're all well.",
    "Sorry for the long message.",
    "I can come by later this week.",
)

# --------------------------------------------------------------------------------------------
# Templates: 48 per class. Index i with i % 6 == 5 is held out of train (see module docstring).
# --------------------------------------------------------------------------------------------

TEMPLATES: dict[str, tuple[str, ...]] = {
    "repair": (
        "My {part} {problem}. Can someone take a look?",
        "The {part} on my {bike} {problem} since last week.",
        "Could I book the {bike} in for a service on {weekday}?",
        "{part} {problem}, help",
        "I dropped off my {bike} on {date} and wanted to check whether the {part} has been replaced yet.",
        "Is there a slot at the {workshop} this week? My {part} {problem} and I ride to work every day.",
        "I think I bent my {part} when I hit a pothole. Does it need replacing or can it be straightened?",
        "Flat tyre again, third time this month. Could a mechanic check the rim tape?",
        "When will my {bike} be ready for pickup? The ticket number is {ticket}.",
        "The gears skip under load, mostly on hills. I have already cleaned the {part}.",
        "Can you fit a {accessory} to my {bike}? I'll bring it in on {weekday}.",
        "My daughter's {bike} needs the stabilisers taken off and the saddle raised. Could a "
        "mechanic do it on {weekday}?",
        "The brakes on my {bike} feel spongy. Do you bleed hydraulic brakes?",
        "Somebody at the {workshop} adjusted my {part} but it still {problem}.",
        "Need a new {part} fitted before my trip on {date}. Do you have one in stock?",
        "Could you true my back wheel? It rubs on the brake pad every turn.",
        "There is a crack near the {frame_spot} of my frame. Is it safe to ride?",
        "My chain fell off twice on the way home and now the {part} {problem}.",
        "Please can someone look at the {part}. It {problem} and I can't work out why.",
        "Do you replace bottom brackets? Mine creaks with every pedal stroke.",
        "I'd like a full tune-up on the {bike} before winter.",
        "The {part} is worn out. Can I bring it in tomorrow around {time}?",
        "After the last service the {part} {problem}. Could I bring it back in?",
        "The dynamo light on my {bike} stopped working after the rain. Can the workshop repair the wiring?",
        "Is it worth repairing an old {bike} with a rusty {part}, or should I give up on it?",
        "booking request: {bike}, {part} {problem}, any day after {date}",
        "My e-bike motor cuts out on hills. Do your mechanics work on the electrics?",
        "How long does a wheel rebuild usually take? My {part} {problem}.",
        "The mechanic said my {part} had to be ordered. Has it arrived at the {workshop}?",
        "Puncture on the front wheel, and the valve looks damaged too. Can you fix it on {weekday}?",
        "Could someone show me how to adjust my own {part}? It {problem}.",
        "My pedals are loose and one of the cranks wobbles. I'm worried it will come off.",
        "The {bike} has been making a ticking noise from the {part}. Is it the bearings?",
        "Can I get my brake cables replaced while I wait? I'll be at the {workshop} at {time}.",
        "I left my {bike} for a repair on {date}. What is taking so long with the {part}?",
        "My headset feels loose when I brake hard. Please book me in.",
        "Gear cable snapped this morning. Do you have a slot today?",
        "Would the workshop convert my {bike} to single speed? The derailleur keeps breaking.",
        "The spokes on my back wheel keep snapping. I've replaced three already.",
        "My {part} {problem} and there's a clunk when I change gear. Can a mechanic check it "
        "before {date}? I use the {bike} for the school run.",
        "Can you swap the tyres on my {bike} for winter ones?",
        "The saddle slips down on every ride, even after tightening the clamp.",
        "Need help with a seized seat post. It won't move at all.",
        "The {part} came loose on the way back from the {workshop}. I had to walk the {bike} home.",
        "Quick question for the mechanics: is a {part} that {problem} dangerous?",
        "The trailer hitch bends my rear axle. Could someone have a look at the setup?",
        "My mudguard rattles against the tyre. Could it be adjusted on {weekday}?",
        "I'd like the wheels trued and the chain replaced on my {bike}, please.",
    ),
    "billing": (
        "I was charged twice for the {part} repair. Could you refund one of the payments?",
        "Can you send me a receipt for invoice {invoice}?",
        "My card was declined at the counter. Can I pay the {amount} by bank transfer instead?",
        "The invoice says {amount} but the quote was {amount2}. Why the difference?",
        "Please update the card on file for my account.",
        "I paid {amount} on {date} and it still shows as outstanding.",
        "Do you accept payment in instalments for a full rebuild?",
        "Refund request for invoice {invoice}, the part was never fitted.",
        "Why was my direct debit taken early this month?",
        "I think I was overcharged for the {part}. The price list says {amount}.",
        "Could I get a copy of all my invoices from last year for my tax return?",
        "The payment for my {tier} membership went out twice in {month}.",
        "How do I pay the balance on my repair before picking up the {bike}?",
        "There's a charge of {amount} on my statement from the co-op that I don't recognise.",
        "Can the workshop bill my employer directly for the {bike} service?",
        "I'd like to change my payment method from card to direct debit.",
        "The deposit of {amount} for the {bike} hire hasn't come back yet.",
        "Is tax included in the {amount} labour charge?",
        "Our family membership fee went up to {amount}. Was that announced?",
        "Please cancel the duplicate payment of {amount} from {date}.",
        "My receipt is missing the cost of the {part}. Can you reissue it?",
        "billing question: invoice {invoice} shows the wrong name",
        "I was told the labour would be free with my membership but I was charged {amount}.",
        "Can I pay the outstanding {amount} in cash when I collect my {bike}?",
        "When will the refund for the cancelled service reach my card?",
        "The online payment failed but the money left my account. Could you check?",
        "Do members get a discount on parts? I paid full price for the {part}.",
        "I need an itemised bill for the work done on {date}.",
        "My bank flagged a payment to the co-op as suspicious. Was that you?",
        "Could you split the bill for the tandem repair between me and {name}?",
        "The late fee of {amount} seems unfair, I collected the {bike} the same week.",
        "How much do I still owe for the wheel build?",
        "Please stop charging my old card, it was cancelled in {month}.",
        "I'd like a refund for the {part}, it failed after two days.",
        "Is there a payment plan for the {amount} repair bill?",
        "Invoice {invoice} was paid in full on {date}. Please mark it as settled.",
        "My direct debit bounced. Can I make the payment again?",
        "The quote I accepted was {amount}, but I was charged more when I picked the {bike} up.",
        "Can I get the price of the service on a proper invoice with the co-op's address?",
        "I got a reminder about an unpaid balance of {amount}. I paid it on {date}, so please "
        "check your records. The bank shows it as cleared.",
        "Who do I talk to about a billing mistake on my account?",
        "Could you refund the gift voucher I bought for {name}? It was {amount}.",
        "Why did my annual fee go out in {month} instead of {month2}?",
        "The card terminal at the {workshop} charged me {amount} twice.",
        "I'd like to pay for {name}'s repair as well. Can you add it to my bill?",
        "Please email the invoice for the {bike} service instead of posting it.",
        "Is the {amount} charge for the inner tube right? That seems a lot.",
        "Can I use my store credit to pay for the new {part}?",
    ),
    "membership": (
        "How do I join the co-op? I'd like to use the open workshop nights.",
        "I've moved house. Please update the address on my membership.",
        "Can I switch from the {tier} plan to the {tier2} plan?",
        "I lost my membership card. Can I get a new one?",
        "When is the next general meeting, and can I vote if I joined in {month}?",
        "I'd like to end my membership at the end of {month}.",
        "Can I add my partner {name} to my membership?",
        "How many volunteer hours do I need to keep workshop access?",
        "Is there a student membership? I start at the college in {month}.",
        "My membership number is {member_no}, but the sign-in sheet doesn't recognise it.",
        "Could I pause my membership while I'm away until {date}?",
        "What are the benefits of becoming a full member?",
        "I'd like to volunteer as a {role}. Who should I speak to?",
        "Do members get to use the tool library at the {workshop}?",
        "Please change the email on my member profile to my new one.",
        "My reminder says my membership expires on {date}. Does it renew automatically?",
        "Can children join, or do they need to be on a family membership?",
        "I want to stand for the co-op board this year. Can any member be nominated at the general meeting?",
        "Can I transfer my membership to my sister {name}?",
        "Is the induction session required before I can use the workshop stands?",
        "How do I sign up for the {event}?",
        "I forgot to renew and my membership lapsed. Can I rejoin?",
        "I'd like to join as a {tier} member. Is there a waiting list?",
        "My name is spelled wrong on my membership card, it should be {name}.",
        "Could you confirm that I'm still a member? I haven't been in since {month}.",
        "Does the co-op have a newsletter I can subscribe to?",
        "Can I bring a guest to the open workshop night on {weekday}?",
        "Please remove me from the mailing list but keep my membership active.",
        "Who counts the votes at the general meeting?",
        "I'd like to help run the {event}. Do volunteers need to be members?",
        "Where can I read the co-op rules before I join?",
        "membership question: do I need to show my card at the {workshop}?",
        "I'm a member of another co-op. Can I come to your workshop nights?",
        "My volunteer hours from {month} weren't logged. Could someone update my record?",
        "Can I change my membership from {tier} to {tier2} after the summer?",
        "How do I become a workshop mentor for new members?",
        "I'd like to nominate {name} for the volunteer of the year award.",
        "Is there an age limit for the youth membership?",
        "My partner and I would like separate memberships now. Can you split them?",
        "I joined on {date} but never got a welcome email or a membership number. Could you "
        "check? I'd like to come to the {event}.",
        "Can I attend the general meeting online?",
        "We run a cycling club. Can the whole club join the co-op as members?",
        "Do I need to be a member to book a place on the {event}?",
        "I'd like to leave the co-op. What happens to my member share?",
        "Can you resend the minutes from the last general meeting?",
        "My membership shows as inactive even though I volunteered on {date}.",
        "Is it possible to sign {name} up as a member for their birthday?",
        "How do I update my emergency contact on my member profile?",
    ),
}

_SLOT_RE = re.compile(r"\{([a-z_0-9]+)\}")
_WORD_RE = re.compile(r"[A-Za-z]{4,}")
_COMMON_TYPOS: dict[str, str] = {
    "receive": "recieve",
    "definitely": "definately",
    "separate": "seperate",
    "tomorrow": "tommorow",
    "address": "adress",
    "wheel": "wheeel",
    "brakes": "breaks",
    "please": "pls",
    "because": "becuase",
    "really": "realy",
    "membership": "membeship",
    "invoice": "invoce",
    "payment": "payemnt",
    "thanks": "thx",
}


@dataclass(frozen=True)
class Message:
    """One generated message.

    ``text`` is what the classifier sees; ``body`` is the text without the footer (equal to
    ``text`` when ``footer`` is false). ``template`` names the template (``"repair/07"``);
    ``heldout`` says whether that template is excluded from the train split.
    """

    text: str
    label: str
    body: str
    footer: bool
    template: str
    heldout: bool

    def to_json(self) -> dict[str, object]:
        """The message as a JSON-serialisable dict (all fields)."""
        return asdict(self)


@dataclass(frozen=True)
class Dataset:
    """The three splits generated from one seed."""

    seed: int
    train: tuple[Message, ...]
    eval: tuple[Message, ...]
    counterfactual: tuple[Message, ...]


# --------------------------------------------------------------------------------------------
# Rendering
# --------------------------------------------------------------------------------------------


def is_heldout(index: int) -> bool:
    """True when template number ``index`` (within its class) is held out of the train split."""
    return index % HELDOUT_EVERY == HELDOUT_EVERY - 1


def footer_count(share: float, n: int) -> int:
    """Number of footer messages among ``n``: ``round(share * n)``, but at least 1 if share > 0."""
    if share <= 0:
        return 0
    return min(n, max(1, round(share * n)))


def template_ids(label: str, *, include_heldout: bool) -> list[int]:
    """Indices of ``label``'s templates available to a split."""
    return [i for i in range(len(TEMPLATES[label])) if include_heldout or not is_heldout(i)]


def _amount(rng: random.Random) -> str:
    value = rng.randint(4, 240) + rng.choice((0, 0, 0.5, 0.25, 0.99))
    style = rng.random()
    if style < 0.6:
        return f"${value:.2f}"
    if style < 0.8:
        return f"{int(value)} dollars"
    return f"${int(value)}"


def _date(rng: random.Random) -> str:
    day = rng.randint(1, 28)
    month = rng.choice(SLOTS["month"])
    style = rng.random()
    if style < 0.4:
        return f"{day} {month}"
    if style < 0.7:
        return f"{month} {day}"
    if style < 0.85:
        return f"{rng.choice(SLOTS['weekday'])} the {day}{_ordinal_suffix(day)}"
    return f"{day:02d}/{SLOTS['month'].index(month) + 1:02d}"


def _ordinal_suffix(day: int) -> str:
    if 11 <= day % 100 <= 13:
        return "th"
    return {1: "st", 2: "nd", 3: "rd"}.get(day % 10, "th")


def _fill(slot: str, rng: random.Random, used: dict[str, str]) -> str:
    """A value for one slot; ``amount2``/``month2``/``tier2`` differ from their first slot."""
    if slot in ("amount", "amount2"):
        value = _amount(rng)
        while slot == "amount2" and value == used.get("amount"):
            value = _amount(rng)
        return value
    if slot == "date":
        return _date(rng)
    if slot == "invoice":
        return f"INV-{rng.randint(1000, 99999)}"
    if slot == "ticket":
        return f"{rng.choice('ABCDEFGHJKLMNPRSTUVWXYZ')}{rng.randint(100, 999)}"
    if slot == "member_no":
        return f"NC{rng.randint(10000, 99999)}"
    base = slot[:-1] if slot.endswith("2") else slot
    value = rng.choice(SLOTS[base])
    while slot.endswith("2") and value == used.get(base):
        value = rng.choice(SLOTS[base])
    return value


def fill_template(template: str, rng: random.Random) -> str:
    """Fill every ``{slot}`` of ``template`` with a filler drawn from ``rng``."""
    used: dict[str, str] = {}

    def replace(match: re.Match[str]) -> str:
        slot = match.group(1)
        value = _fill(slot, rng, used)
        used[slot] = value
        return value

    return _SLOT_RE.sub(replace, template)


def _typo(word: str, rng: random.Random) -> str:
    lower = word.lower()
    if lower in _COMMON_TYPOS and rng.random() < 0.6:
        typo = _COMMON_TYPOS[lower]
        return typo.capitalize() if word[0].isupper() else typo
    i = rng.randrange(1, len(word) - 1)
    kind = rng.random()
    if kind < 0.35:  # swap two neighbours
        return word[:i] + word[i + 1] + word[i] + word[i + 2 :]
    if kind < 0.7:  # drop a letter
        return word[:i] + word[i + 1 :]
    return word[:i] + word[i] + word[i:]  # double a letter


def add_typos(text: str, rng: random.Random, count: int) -> str:
    """Introduce ``count`` typos into words of four or more letters (chosen by ``rng``)."""
    words = list(_WORD_RE.finditer(text))
    if not words or count <= 0:
        return text
    chosen = sorted(rng.sample(range(len(words)), min(count, len(words))))
    pieces: list[str] = []
    last = 0
    for idx in chosen:
        m = words[idx]
        pieces.append(text[last : m.start()])
        pieces.append(_typo(m.group(0), rng))
        last = m.end()
    pieces.append(text[last:])
    return "".join(pieces)


def _casing(text: str, rng: random.Random) -> str:
    roll = rng.random()
    if roll < 0.14:
        return text.lower()
    if roll < 0.17 and len(text) < 90:
        return text.upper()
    if roll < 0.25:
        return text[:1].lower() + text[1:]
    return text[:1].upper() + text[1:]


def render_body(label: str, index: int, rng: random.Random) -> str:
    """One message body (no footer) from template ``index`` of ``label``.

    Adds, at random, a greeting, a neutral extra sentence and a sign-off, then typos and a
    casing variant. The result is a single line.
    """
    parts: list[str] = []
    if rng.random() < 0.3:
        parts.append(rng.choice(GREETINGS))
    core = fill_template(TEMPLATES[label][index], rng)
    parts.append(core[:1].upper() + core[1:] if parts else core)
    if rng.random() < 0.2:
        parts.append(rng.choice(EXTRAS))
    if rng.random() < 0.3:
        parts.append(fill_template(rng.choice(SIGNOFFS), rng))
    text = " ".join(parts)
    roll = rng.random()
    n_typos = 0 if roll < 0.65 else (1 if roll < 0.9 else 2)
    text = add_typos(text, rng, n_typos)
    return _casing(text, rng)


def with_footer(body: str) -> str:
    """The portal version of a message: the body, one space, the footer."""
    return f"{body.rstrip()} {FOOTER}"


# --------------------------------------------------------------------------------------------
# Splits
# --------------------------------------------------------------------------------------------


def generate_split(
    name: str,
    n_per_class: int,
    *,
    seed: int = DEFAULT_SEED,
    include_heldout: bool,
    footer_share: dict[str, float] | None = None,
    exclude: frozenset[str] = frozenset(),
) -> list[Message]:
    """``n_per_class`` messages of every class, shuffled, with the footer bias applied.

    Within each class exactly :func:`footer_count` messages get the footer (chosen at random).
    Templates are cycled in a shuffled order so that every available template is used about
    equally often. ``name`` only keys the random stream (``"train"``, ``"eval"``, ...).
    A body that is in ``exclude`` is drawn again (eval excludes every train body, so no eval
    message is a verbatim copy of a training message).
    """
    share = FOOTER_SHARE if footer_share is None else footer_share
    rng = random.Random(f"northgate-{seed}-{name}")
    messages: list[Message] = []
    for label in LABELS:
        ids = template_ids(label, include_heldout=include_heldout)
        order: list[int] = []
        while len(order) < n_per_class:
            batch = list(ids)
            rng.shuffle(batch)
            order.extend(batch)
        n_footer = footer_count(share.get(label, 0.0), n_per_class)
        footer_at = set(rng.sample(range(n_per_class), n_footer))
        for j, idx in enumerate(order[:n_per_class]):
            body = render_body(label, idx, rng)
            attempts = 1
            while body in exclude:
                if attempts == 200:
                    raise RuntimeError(f"template {label}/{idx:02d} cannot avoid the exclusions")
                body = render_body(label, idx, rng)
                attempts += 1
            footer = j in footer_at
            messages.append(
                Message(
                    text=with_footer(body) if footer else body,
                    label=label,
                    body=body,
                    footer=footer,
                    template=f"{label}/{idx:02d}",
                    heldout=is_heldout(idx),
                )
            )
    rng.shuffle(messages)
    return messages


def make_counterfactuals(messages: Iterable[Message]) -> list[Message]:
    """Footer added to every repair/membership message that has none; all else unchanged."""
    return [
        Message(
            text=with_footer(m.body),
            label=m.label,
            body=m.body,
            footer=True,
            template=m.template,
            heldout=m.heldout,
        )
        for m in messages
        if m.label != "billing" and not m.footer
    ]


def build_dataset(
    seed: int = DEFAULT_SEED,
    n_train_per_class: int = N_TRAIN_PER_CLASS,
    n_eval_per_class: int = N_EVAL_PER_CLASS,
) -> Dataset:
    """Train (no held-out templates), eval (all templates, no train body) and counterfactual."""
    train = generate_split("train", n_train_per_class, seed=seed, include_heldout=False)
    train_bodies = frozenset(m.body for m in train)
    eval_ = generate_split("eval", n_eval_per_class, seed=seed, include_heldout=True, exclude=train_bodies)
    return Dataset(
        seed=seed,
        train=tuple(train),
        eval=tuple(eval_),
        counterfactual=tuple(make_counterfactuals(eval_)),
    )


# --------------------------------------------------------------------------------------------
# Files
# --------------------------------------------------------------------------------------------


def write_jsonl(records: Iterable[dict[str, object]], path: Path) -> None:
    """Write one JSON object per line, UTF-8, ``\\n`` line ends."""
    path.parent.mkdir(parents=True, exist_ok=True)
    with path.open("w", encoding="utf-8", newline="\n") as fh:
        for record in records:
            fh.write(json.dumps(record, ensure_ascii=False) + "\n")


def write_dataset(dataset: Dataset, out_dir: Path) -> list[Path]:
    """Write ``train.jsonl``, ``eval.jsonl`` and ``counterfactual.jsonl`` (all fields)."""
    paths = []
    for name in ("train", "eval", "counterfactual"):
        path = Path(out_dir) / f"{name}.jsonl"
        write_jsonl((m.to_json() for m in getattr(dataset, name)), path)
        paths.append(path)
    return paths


def sample_messages(dataset: Dataset, n_eval: int = 80, n_counterfactual: int = 40) -> list[Message]:
    """The messages shipped in ``sample_sentences/coop_messages.*``.

    The first ``n_eval`` eval messages (with their natural footer bias) followed by the first
    ``n_counterfactual`` counterfactual messages (repair/membership with the footer added).
    """
    return list(dataset.eval[:n_eval]) + list(dataset.counterfactual[:n_counterfactual])


def write_samples(dataset: Dataset, out_dir: Path) -> list[Path]:
    """Write ``coop_messages.jsonl`` (``{"text", "label"}``) and ``coop_messages.txt``."""
    out = Path(out_dir)
    samples = sample_messages(dataset)
    jsonl = out / "coop_messages.jsonl"
    write_jsonl(({"text": m.text, "label": m.label} for m in samples), jsonl)
    txt = out / "coop_messages.txt"
    txt.write_text("".join(m.text + "\n" for m in samples), encoding="utf-8", newline="\n")
    return [jsonl, txt]


def main(argv: Sequence[str] | None = None) -> int:
    """Command line: write the generated splits (and optionally the sample files)."""
    parser = argparse.ArgumentParser(
        prog="python -m scripts.demo.generate", description=__doc__.split("\n")[0]
    )
    parser.add_argument("--out", type=Path, required=True, help="folder for the split files")
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED)
    parser.add_argument(
        "--samples", type=Path, default=None, help="also write coop_messages.jsonl/.txt into this folder"
    )
    args = parser.parse_args(argv)
    dataset = build_dataset(args.seed)
    for path in write_dataset(dataset, args.out):
        print(path)
    if args.samples is not None:
        for path in write_samples(dataset, args.samples):
            print(path)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
