"""Who a patient is: the patient register, pure (no I/O, no clock).

Feeds name one person in several ways. Each name becomes a *key* string:

- the site's own identifier (``patient_id_system``): its bare value, ``HG100001``
  (the form gasgap has always stored, and what ``gasgap patient MRN`` looks up);
- any other identifier: ``system|value`` (FHIR Patient.identifier; HL7 PID-3 with its
  assigning authority as the system, see ``hl7_identifier_key``);
- a FHIR resource reference: ``ref:<source>:Patient/<id>`` (relative, absolute and
  versioned references are one key, ``reference_key``), or ``ref:<source>:urn:uuid:...``
  inside a Bundle. A patient known only by references is *provisional*.

Adapters emit ``PatientLink`` records (keys that name one person) and ``PatientFacts``
(birth date, location, as known at a time). ``PatientRegister.learn`` takes a link and
answers with the re-keyings it causes; ``canonical`` gives the key to store readings
under.

The canonical key of a person depends only on the set of links learnt, never on their
order: a site identifier if the group holds exactly one, else the best of the other
keys by rank (identifier before reference) and then by text. Safety rule: two
different site identifiers are never joined. The register keeps the site identifiers
apart and the names that link them (e.g. one ``Patient/<id>`` given two MRNs) become a
*disputed* group of their own, reported in ``LearnResult.disputes``, so one person's
oxygen is never paired with another person's gas.

Mechanics: a union-find over the non-site keys (unions by size, path halving); each
root remembers the site identifiers its links named. A link that names only site
identifiers joins nothing (two of them are a dispute).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from datetime import date, datetime
from enum import IntEnum

from monitor.engine.model import Location

REFERENCE_PREFIX = "ref:"


class KeyRank(IntEnum):
    """How much a key says about a person: lower is better as a canonical key."""

    SITE_IDENTIFIER = 0
    IDENTIFIER = 1
    REFERENCE = 2


@dataclass(frozen=True, slots=True)
class RegisterSettings:
    """What the register needs from the site.

    ``authorities`` maps HL7 assigning-authority names (PID-3.4.1) to identifier systems
    (e.g. ``{"HG": "urn:oid:2.999.1.1.1"}``) so an HL7 MRN and a FHIR identifier meet;
    ``unqualified_system`` is the system assumed for a PID-3 without an authority (None:
    the identifier is scoped to its feed, ``hl7:<source>``).
    """

    patient_id_system: str | None = None
    authorities: Mapping[str, str] = field(default_factory=dict)
    unqualified_system: str | None = None


@dataclass(frozen=True, slots=True)
class PatientLink:
    """Keys that name one person, as one source said at one time (``at`` may be None)."""

    keys: tuple[str, ...]
    source: str = ""
    at: datetime | None = None


@dataclass(frozen=True, slots=True)
class PatientFacts:
    """What a source said about the person a key names, as of ``at``."""

    key: str
    birth_date: date | None = None
    location: Location | None = None
    at: datetime | None = None


@dataclass(frozen=True, slots=True)
class Rekey:
    """Every row stored under ``old`` now belongs to ``new`` (the same person)."""

    old: str
    new: str


@dataclass(frozen=True, slots=True)
class Dispute:
    """Names that link different site identifiers: kept apart, shown for inspection."""

    keys: tuple[str, ...]
    site_identifiers: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class LearnResult:
    rekeys: tuple[Rekey, ...] = ()
    disputes: tuple[Dispute, ...] = ()


@dataclass(frozen=True, slots=True)
class Person:
    """What the register knows of the person a canonical key names."""

    key: str
    keys: frozenset[str]
    provisional: bool
    disputed: bool
    birth_date: date | None
    location: Location | None
    notes: tuple[str, ...] = ()


# --- keys ----------------------------------------------------------------------------------


def identifier_key(system: str | None, value: str, site_system: str | None, scope: str) -> str:
    """The key of an identifier: the bare value in the site's system, else system|value.

    An identifier without a system is scoped to the feed that sent it (``scope``).
    A site value containing '|' or starting like a reference keeps the long form.
    """
    value = value.strip()
    sys_ = (system or "").strip() or scope
    if sys_ == site_system and "|" not in value and not value.startswith(REFERENCE_PREFIX):
        return value
    return f"{sys_}|{value}"


def reference_key(source: str, reference: str) -> str | None:
    """``ref:<source>:Patient/<id>`` for any form of a reference to one resource.

    'Patient/1', 'http://host/fhir/Patient/1' and '.../Patient/1/_history/3' are one
    key; 'urn:uuid:...' stays as it is (unique by construction); a contained '#x' or an
    empty text names nobody (None).
    """
    text = (reference or "").strip()
    if not text or text.startswith("#"):
        return None
    if text.startswith(("urn:uuid:", "urn:oid:")):
        return f"{REFERENCE_PREFIX}{source}:{text}"
    parts = [p for p in text.split("?", 1)[0].split("/") if p]
    if "_history" in parts:
        parts = parts[: parts.index("_history")]
    if len(parts) < 2:
        return None
    return f"{REFERENCE_PREFIX}{source}:{parts[-2]}/{parts[-1]}"


def hl7_identifier_key(
    value: str,
    namespace: str,
    universal_id: str,
    universal_type: str,
    settings: RegisterSettings,
    source: str,
) -> str:
    """The key of one PID-3 repetition (CX: value, authority namespace^universal id^type).

    The system is, in order: the site's ``patient_id_system`` when the authority names it
    (by namespace or universal id); the system ``authorities`` maps the namespace to;
    ``urn:oid:<universal id>`` for an ISO OID (a URI stays as it is); the namespace; the
    site's ``unqualified_system``; else the feed (``hl7:<source>``).
    """
    site = settings.patient_id_system
    uid = universal_id.strip()
    uid_system = ""
    if uid:
        if uid.startswith(("urn:", "http:", "https:")):
            uid_system = uid
        elif universal_type.upper() == "ISO" or all(p.isdigit() for p in uid.split(".")):
            uid_system = f"urn:oid:{uid}"
        else:
            uid_system = uid
    ns = namespace.strip()
    names = {n for n in (ns, uid, uid_system) if n}
    if site and site in names:
        system: str | None = site
    elif ns and ns in settings.authorities:
        system = settings.authorities[ns]
    elif uid_system:
        system = uid_system
    elif ns:
        system = ns
    else:
        system = settings.unqualified_system
    return identifier_key(system, value, site, f"hl7:{source}")


def key_rank(key: str) -> KeyRank:
    if key.startswith(REFERENCE_PREFIX):
        return KeyRank.REFERENCE
    if "|" in key:
        return KeyRank.IDENTIFIER
    return KeyRank.SITE_IDENTIFIER


def best_key(keys: Iterable[str]) -> str:
    """The canonical choice among keys of one person: by rank, then by text."""
    return min(keys, key=lambda k: (key_rank(k), k))


def is_provisional(key: str) -> bool:
    """True when the key is a resource reference: no identifier known for the person yet."""
    return key_rank(key) is KeyRank.REFERENCE


def provisional_label(key: str) -> str:
    """How a provisional patient is shown: never as a raw 'Patient/x' reference.

    'ref:ehr:Patient/pt-1047' -> 'provisional patient (ehr record …1047)': the source
    and the last four characters of the record id, enough to find it, too few to be
    taken for an identifier.
    """
    body = key[len(REFERENCE_PREFIX) :]
    source, _, ref = body.partition(":")
    tail = ref.rsplit("/", 1)[-1].rsplit(":", 1)[-1]
    return f"provisional patient ({source or 'unknown source'} record …{tail[-4:]})"


# --- the register --------------------------------------------------------------------------


class PatientRegister:
    """Links learnt in any order -> one canonical key per person (see the module doc)."""

    def __init__(self, settings: RegisterSettings | None = None) -> None:
        self.settings = settings or RegisterSettings()
        self._parent: dict[str, str] = {}
        self._members: dict[str, list[str]] = {}  # root -> non-site keys
        self._sites: dict[str, frozenset[str]] = {}  # root -> site identifiers named
        self._site_keys: set[str] = set()
        self._attached: dict[str, set[str]] = {}  # site identifier -> roots naming it
        self._facts: dict[str, list[PatientFacts]] = {}
        # Answers memoised while nothing changes: every Observation of a feed repeats
        # its patient's link and asks for the person again. Any change clears both.
        self._learnt: dict[tuple[str, ...], LearnResult] = {}
        self._people: dict[str, Person] = {}
        self._changes = 0

    def _changed(self) -> None:
        self._changes += 1
        if self._learnt:
            self._learnt = {}
        if self._people:
            self._people = {}

    # -- union-find over the non-site keys --

    def _find(self, key: str) -> str:
        parent = self._parent
        while parent[key] != key:
            parent[key] = parent[parent[key]]
            key = parent[key]
        return key

    def _add(self, key: str) -> None:
        if key_rank(key) is KeyRank.SITE_IDENTIFIER:
            if key not in self._site_keys:
                self._changed()
                self._site_keys.add(key)
                self._attached.setdefault(key, set())
        elif key not in self._parent:
            self._changed()
            self._parent[key] = key
            self._members[key] = [key]
            self._sites[key] = frozenset()

    def _root_key(self, root: str) -> str:
        sites = self._sites[root]
        if len(sites) == 1:
            return next(iter(sites))
        return best_key(self._members[root])

    def _union(self, a: str, b: str) -> str:
        ra, rb = self._find(a), self._find(b)
        if ra == rb:
            return ra
        self._changed()
        if len(self._members[ra]) < len(self._members[rb]):
            ra, rb = rb, ra
        self._parent[rb] = ra
        self._members[ra].extend(self._members.pop(rb))
        sites = self._sites[ra] | self._sites.pop(rb)
        self._sites[ra] = sites
        for site in sites:
            roots = self._attached[site]
            roots.discard(rb)
            roots.add(ra)
        return ra

    # -- public --

    def knows(self, key: str) -> bool:
        return key in self._parent or key in self._site_keys

    def canonical(self, key: str) -> str:
        """The key rows of this person are stored under (the key itself when unknown)."""
        if key_rank(key) is KeyRank.SITE_IDENTIFIER or key not in self._parent:
            return key
        return self._root_key(self._find(key))

    def learn(self, link: PatientLink) -> LearnResult:
        """Take one link; say which stored keys move to which, and any dispute.

        A re-keying is reported only for a key the register already knew, whose whole
        group moves to the new key. When a link joins groups that already belonged to
        different site identifiers, nothing moves: the dispute is reported instead.
        """
        known = self._learnt.get(link.keys)
        if known is not None:
            return known  # the same link again, nothing changed since: the same answer
        changes = self._changes
        result = self._learn(link)
        if self._changes == changes:
            self._learnt[link.keys] = result
        return result

    def _learn(self, link: PatientLink) -> LearnResult:
        keys = sorted({k.strip() for k in link.keys if k and k.strip()})
        if not keys:
            return LearnResult()
        sites = frozenset(k for k in keys if key_rank(k) is KeyRank.SITE_IDENTIFIER)
        others = [k for k in keys if key_rank(k) is not KeyRank.SITE_IDENTIFIER]
        old_roots = {self._find(k) for k in others if k in self._parent}
        old = {r: (self._root_key(r), self._sites[r]) for r in old_roots}
        for k in keys:
            self._add(k)
        if not others:
            if len(sites) > 1:
                return LearnResult(disputes=(Dispute(tuple(keys), tuple(sorted(sites))),))
            return LearnResult()
        root = others[0]
        for k in others[1:]:
            root = self._union(root, k)
        root = self._find(root)
        if not sites <= self._sites[root]:
            self._changed()
            self._sites[root] = self._sites[root] | sites
        for site in sites:
            if root not in self._attached[site]:
                self._changed()
                self._attached[site].add(root)
        new_key = self._root_key(root)
        new_sites = self._sites[root]
        rekeys: list[Rekey] = []
        disputes: list[Dispute] = []
        if len(new_sites) > 1:
            disputes.append(Dispute(tuple(sorted(self._members[root])), tuple(sorted(new_sites))))
        for old_key, old_sites in old.values():
            if old_key == new_key:
                continue
            if len(old_sites) == 1 and len(new_sites) > 1:
                continue  # a split, not a move: reported as the dispute
            rekeys.append(Rekey(old_key, new_key))
        return LearnResult(
            tuple(sorted(set(rekeys), key=lambda r: (r.old, r.new))), tuple(disputes)
        )

    def learn_all(self, links: Iterable[PatientLink]) -> LearnResult:
        rekeys: dict[str, str] = {}
        disputes: list[Dispute] = []
        for link in links:
            result = self.learn(link)
            for rk in result.rekeys:
                for old, new in list(rekeys.items()):
                    if new == rk.old:
                        rekeys[old] = rk.new
                rekeys[rk.old] = rk.new
            disputes.extend(result.disputes)
        chained = tuple(Rekey(o, n) for o, n in sorted(rekeys.items()) if o != n)
        return LearnResult(chained, tuple(disputes))

    def note(self, facts: PatientFacts) -> None:
        """Remember facts about the person a key names (they follow later links)."""
        self._add(facts.key)
        self._changed()
        self._facts.setdefault(facts.key, []).append(facts)

    def keys_of(self, key: str) -> frozenset[str]:
        """Every key naming the person ``canonical(key)`` names."""
        canon = self.canonical(key)
        if key_rank(canon) is KeyRank.SITE_IDENTIFIER:
            out = {canon}
            for root in self._attached.get(canon, ()):
                if len(self._sites[root]) == 1:
                    out.update(self._members[root])
            return frozenset(out)
        if key in self._parent:
            return frozenset(self._members[self._find(key)])
        return frozenset({key})

    def person(self, key: str) -> Person:
        """The person a key names: canonical key, all keys, and merged facts.

        Birth date: the one given under the best-ranked key (a disagreement is noted);
        location: the most recent by ``at`` (facts without a time count as oldest; ties
        go to the best-ranked key).
        """
        known = self._people.get(key)
        if known is None:
            known = self._people[key] = self._person(key)
        return known

    def _person(self, key: str) -> Person:
        canon = self.canonical(key)
        keys = self.keys_of(key)
        facts = [f for k in keys for f in self._facts.get(k, ())]
        births = sorted(
            ((key_rank(f.key), f.key, f.birth_date) for f in facts if f.birth_date),
        )
        notes: list[str] = []
        if len({b for _, _, b in births}) > 1:
            notes.append("sources disagree on the birth date; the best-identified one is used")
        located = [f for f in facts if f.location is not None]
        located.sort(
            key=lambda f: (
                f.at is not None,
                f.at or datetime.min,
                -key_rank(f.key),
                _reverse_text(f.key),
            )
        )
        disputed = False
        if canon in self._parent:
            disputed = len(self._sites[self._find(canon)]) > 1
        return Person(
            key=canon,
            keys=keys,
            provisional=is_provisional(canon),
            disputed=disputed,
            birth_date=births[0][2] if births else None,
            location=located[-1].location if located else None,
            notes=tuple(notes),
        )

    def groups(self) -> dict[str, frozenset[str]]:
        """Canonical key -> all its keys, for every person the register knows."""
        out: dict[str, frozenset[str]] = {}
        for k in sorted(self._site_keys):
            out[k] = self.keys_of(k)
        for root in self._members:
            canon = self._root_key(root)
            if canon not in out:
                out[canon] = self.keys_of(root)
        return out


def _reverse_text(text: str) -> tuple[int, ...]:
    """Sort key that orders texts in reverse (smaller text sorts last)."""
    return tuple(-ord(c) for c in text)
