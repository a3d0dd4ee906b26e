"""Generate the demo archive: sixty years of papers from Pellmarrow, an invented harbour town.

Pellmarrow, its streets, its people and every sentence below are made up. The archive holds
gazette articles, council minutes and letters to the editor dated 1950-2009 (about 15,000 word
tokens a year, so about 150,000 a decade). Each document is mostly about one topic (the harbour,
the weather, the market, the council, the theatre, the railway, ...); its sentences come from a
few templates whose slots are filled from that topic's Zipf-distributed word lists. Words that
every topic would share are pinned down instead: each topic has its own place in town, day and
month names occur only in the fixed last line of council minutes, and the letter writers' words
for themselves only in the fixed first line of a letter (a rare word met beside every topic's
words gets a vector that wanders with the mix of topics, and would look like a change of meaning).

Planted on top, listed in planted.csv:
  shift      a word that moves from one topic's contexts to another's at its onset year,
             at a steady frequency (a change of meaning);
  frequency  a word that keeps its topic but whose frequency changes about sevenfold;
  emerging   a word absent before its onset year, frequent after it;
  fading     a word frequent before its onset year, absent after it.

Run ``python data_demo/generate.py`` to rewrite archive.csv.gz, planted.csv and counts.json
beside this script; the output is identical on every run (fixed seed, gzip mtime 0). Only
``Generator.random`` is drawn from, so the stream does not depend on numpy's sampling helpers.
"""

from __future__ import annotations

import argparse
import csv
import gzip
import hashlib
import io
import itertools
import json
import re
from collections import Counter
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

SEED = 1950
FIRST_YEAR = 1950
LAST_YEAR = 2009
TOKENS_PER_YEAR = 15_000
#: The tokenization drift uses by default: lower-cased Unicode word characters.
TOKEN_PATTERN = re.compile(r"\w+")

# --------------------------------------------------------------------------------------------
# Vocabulary. Every word belongs to exactly one list (checked by vocabulary_problems()).
# Verbs are regular past forms so that "was landed" and "landed the" both read.
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Topic:
    """One subject of the town's papers: its nouns, verbs and adjectives, most common first."""

    name: str
    weight: float
    nouns: tuple[str, ...]
    verbs: tuple[str, ...]
    adjectives: tuple[str, ...]

    @property
    def core_nouns(self) -> tuple[str, ...]:
        """The nouns drawn often enough to be in every decade's model."""
        return self.nouns[:CORE_NOUNS]

    @property
    def rare_nouns(self) -> tuple[str, ...]:
        """The long tail: drawn so seldom that most stay under a model's minimum count."""
        return self.nouns[CORE_NOUNS:]


def _words(text: str) -> tuple[str, ...]:
    return tuple(text.split())


#: Nouns of a topic beyond the first CORE_NOUNS form its rare tail; each rare noun takes
#: RARE_NOUN_SHARE_EACH of the topic's noun slots (a few occurrences a decade).
CORE_NOUNS = 28
RARE_NOUN_SHARE_EACH = 0.004

TOPICS: tuple[Topic, ...] = (
    Topic(
        "harbour", 1.6,
        _words(
            "boat trawler net catch skipper crew pier mooring fleet mackerel cod crab lobster "
            "deck wharf slipway anchor buoy tide fisherman oar sail mast rigging dinghy haul "
            "cargo jetty boathouse breakwater sprat pilchard shellfish oyster mussel bait hook "
            "creel winch berth capstan harbourmaster barrel smack lugger coxswain lifeboat "
            "ferry tug bowsprit tackle keelson gunwale rudder tiller fishery moorings trawl "
            "pontoon ketch quayside"
        ),
        _words(
            "landed hauled moored docked towed anchored netted salted gutted unloaded rowed "
            "sailed trawled steered beached"
        ),
        _words("seaworthy tidal briny leaky sturdy inshore offshore"),
    ),
    Topic(
        "weather", 1.0,
        _words(
            "gale storm rain wind fog frost snow cloud sunshine thunder lightning flood "
            "drizzle breeze squall forecast barometer temperature heatwave drought hail mist "
            "gust sky horizon swell wave surge spray shore beach sand shingle dune erosion "
            "seawall downpour rainfall tempest blizzard thaw dew rainbow whirlwind puddle "
            "floodwater weathervane gauge almanac sleet showers"
        ),
        _words("lashed battered flooded drenched howled cleared warmed cooled soaked chilled"),
        _words("stormy windy foggy frosty sunny mild wet"),
    ),
    Topic(
        "market", 1.3,
        _words(
            "stall price shop shopkeeper grocer butcher baker bread butter cheese egg milk "
            "sugar flour tea apple potato cabbage onion bacon customer bargain sale shilling "
            "penny counter basket merchant warehouse supply wholesaler ledger pantry fishcake "
            "greengrocer draper haberdasher ironmonger parcel hamper sausage pie jam honey "
            "biscuit marmalade lard vinegar pickle scales till receipt errand pudding"
        ),
        _words("sold bought priced weighed wrapped stocked bargained ordered delivered packed"),
        _words("fresh cheap tasty stale ripe homemade crusty"),
    ),
    Topic(
        "council", 1.2,
        _words(
            "mayor motion vote budget ratepayer election candidate ballot agenda chamber "
            "treasurer bylaw housing estate planning scheme grant loan rent tenant "
            "policy debate majority opposition resolution amendment deputation petition "
            "inquiry surveyor officer department allowance rates charter mayoralty "
            "constituency manifesto referendum audit expenditure levy subsidy sewer drainage "
            "refuse streetlamp pavement allotment"
        ),
        _words(
            "approved rejected debated adopted deferred proposed seconded opposed elected "
            "audited"
        ),
        _words("municipal civic statutory annual unanimous lengthy heated costly"),
    ),
    Topic(
        "theatre", 1.5,
        _words(
            "stage curtain audience singer comedian song chorus orchestra piano fiddle "
            "concert pantomime balcony usher performer dancer juggler conductor melody tune "
            "interval encore applause rehearsal footlights programme poster film projector "
            "cinema reel actress actor spotlight costume ballad matinee musical troupe "
            "playbill ventriloquist accordion drummer soprano tenor comedy farce"
        ),
        _words("performed applauded rehearsed staged sung danced cheered booed filmed featured"),
        _words("lively merry tuneful comic dramatic theatrical"),
    ),
    Topic(
        "railway", 1.0,
        _words(
            "train station platform locomotive carriage wagon signalman porter guard "
            "timetable rail sleeper junction siding tunnel viaduct goods passenger fare "
            "luggage whistle steam boiler footbridge crossing stationmaster excursion branch "
            "terminus railwayman shunter firebox tender coupling buffer gradient embankment "
            "cutting waggon turntable engineshed railcar sidings"
        ),
        _words("shunted derailed coupled stopped departed arrived scheduled delayed cancelled"),
        _words("punctual overdue crowded northbound southbound express"),
    ),
    Topic(
        "school", 1.0,
        _words(
            "pupil teacher headmaster classroom lesson desk blackboard chalk exam homework "
            "playground uniform satchel spelling arithmetic reading prize inspector governor "
            "scholarship schoolroom register assembly textbook pencil inkwell ruler headmistress "
            "timetabling geography history grammar recitation dictation caretaker prefect "
            "sportsday schoolboy schoolgirl infant tuition syllabus"
        ),
        _words("taught learned examined punished rewarded enrolled tested graded educated"),
        _words("clever diligent studious unruly attentive educational"),
    ),
    Topic(
        "church", 1.0,
        _words(
            "vicar parish chapel choir hymn sermon pew altar bell steeple organ font "
            "congregation bishop curate churchyard grave candle prayer vestry pulpit lectern "
            "chancel nave crypt baptism wedding funeral verger sexton psalm rector cathedral "
            "sacrament bellringer chaplain hassock collection offertory lychgate"
        ),
        _words("blessed prayed preached worshipped christened married buried consecrated"),
        _words("holy solemn sacred pious reverent devout"),
    ),
    Topic(
        "farming", 1.0,
        _words(
            "farm farmer plough barn cattle cow sheep lamb pig hen horse tractor hay wheat "
            "barley oats harvest meadow hedge pasture orchard dairy stable fodder silage "
            "fertiliser seed crop furrow shepherd ram ewe calf heifer bullock haystack "
            "cornfield scarecrow sheepdog ploughman farmhand threshing dung manure acre "
            "livestock"
        ),
        _words("ploughed harvested sowed grazed milked reaped fenced threshed mowed"),
        _words("fertile muddy rural arable grassy bountiful"),
    ),
    Topic(
        "health", 1.0,
        _words(
            "nurse hospital ward patient surgery medicine chemist pill bandage fever cough "
            "illness clinic ambulance midwife dispensary ointment tonic prescription "
            "injection vaccine measles influenza physician surgeon infirmary sanatorium "
            "stretcher thermometer syrup plaster remedy epidemic infection diet matron "
            "convalescence dentist spectacles inoculation"
        ),
        _words("treated nursed cured vaccinated diagnosed bandaged prescribed"),
        _words("healthy sickly feverish contagious medical ailing"),
    ),
    Topic(
        "signals", 1.4,
        _words(
            "telephone exchange operator wire cable switchboard receiver aerial valve circuit "
            "battery transmitter wireless dial message keyboard printer terminal socket plug "
            "fuse meter relay antenna console apparatus frequency bulletin announcer studio "
            "microphone loudspeaker transistor amplifier headphones wavelength "
            "electrician voltage generator"
        ),
        _words("wired connected switched tuned transmitted relayed installed dialled"),
        _words("electric electrical faulty crackling automatic modern"),
    ),
    Topic(
        "shipyard", 1.0,
        _words(
            "shipyard dock crane rivet plate welder foreman apprentice timber plank tar "
            "hammer forge furnace steel iron lathe drydock gantry shipwright boilermaker "
            "riveter scaffold blueprint bolt girder shed workbench sawmill oakum caulker "
            "anvil chisel smelter foundry ironwork workshop"
        ),
        _words("riveted welded hammered forged launched caulked hoisted repaired fitted"),
        _words("skilled industrial noisy watertight"),
    ),
    Topic(
        "sport", 1.0,
        _words(
            "football cricket match team goal referee league cup trophy regatta rowing race "
            "runner swimmer bowls fixture champion medal umpire wicket bat ball supporter "
            "spectator tournament innings striker goalkeeper oarsman sprint victory "
            "defeat draw scoreline kickoff clubhouse"
        ),
        _words("scored played defended kicked bowled raced trained"),
        _words("sporting athletic victorious unbeaten nimble"),
    ),
)

TIME_NOUNS = _words(
    "week month year season summer winter spring autumn morning evening night day"
)
#: Who a letter writer says they are, in the letter's fixed opening line ("sir as a resident of
#: this town ..."): the only place these words occur, so their contexts never follow the topic.
GENERAL_NOUNS = _words("resident neighbour reader visitor householder")
GENERAL_VERBS = _words(
    "mentioned noticed discussed praised criticised welcomed remembered visited "
    "inspected improved checked opened closed"
)
GENERAL_ADJECTIVES = _words("new old small large fine poor busy early local young great good")
#: Day and month names occur only in the fixed last sentence of council minutes ("the next
#: meeting will be held on the first tuesday of march"), never beside a topic's words.
WEEKDAYS = _words("monday tuesday wednesday thursday friday")
MONTHS = _words(
    "january february march april may june july august september october november december"
)
TITLES = _words("mr mrs miss alderman councillor captain doctor reverend")
SURNAMES = _words(
    "brackwen corrody dallowick ewstacey fennick garrowin hollisk ibbotsey kellowan larrick "
    "marrable nettleby ormsey pellow quillet rusking sarrow tavistan umberlay vossick "
    "wenlow yarrowby abbotrey"
)
#: Each topic's own part of town: a document names only the place of its main topic (a letter
#: writer signs from there too), so a place's words keep one topic's contexts.
PLACE_OF_TOPIC = {
    "harbour": "fisher row", "weather": "gullstone point", "market": "brine street",
    "council": "tallowgate", "theatre": "lanterns end", "railway": "oss bridge",
    "school": "marrow hill", "church": "windle green", "farming": "the saltings",
    "health": "copperhythe", "signals": "kelp lane", "shipyard": "the ropewalk",
    "sport": "harrowfield",
}
PLACES = tuple(PLACE_OF_TOPIC.values())
#: Letter writers sign with one of many invented surnames, each used only a few times.
LETTER_SIGNATURES = tuple(
    head + tail
    for head in _words("brack corr dall ews fenn garr holl ibb kell larr marr nett orms quill "
                       "rusk sarr tav umber voss yarr")
    for tail in _words("ule ock essy ather imore iby en ault ish orrow ane ith")
)
#: Which council committee minutes a topic's business.
COMMITTEE_OF_TOPIC = {
    "harbour": "harbour", "weather": "coastal", "market": "markets", "council": "finance",
    "theatre": "entertainments", "railway": "transport", "school": "education",
    "church": "burial", "farming": "allotments", "health": "health", "signals": "telephones",
    "shipyard": "shipping", "sport": "recreation",
}

TOPIC_BY_NAME = {t.name: t for t in TOPICS}

# --------------------------------------------------------------------------------------------
# Sentence templates. Slots: {N} topic noun, {V} verb, {A} adjective, {T} a time, {P} a person,
# {L} the topic's place. "a" becomes "an" before a vowel. The fixed opening and closing lines of
# minutes and letters (make_document) carry the general nouns, day and month names.
# --------------------------------------------------------------------------------------------

GAZETTE_TEMPLATES = (
    "the {A} {N} and the {N} were {V} at the {N} this {T}",
    "{P} said the {N} and the {A} {N} had been {V} near the {N}",
    "a {A} {N} {V} the {N} by the {N} and the {N}",
    "there was talk in the town of the {N} the {N} and the {N}",
    "the {N} {V} the {A} {N} after the {N} of the {N}",
    "it is hoped that the {N} and the {N} will be {V} before the {T} is out",
    "members of the {N} {V} the {N} with a {A} {N} and a {N}",
    "we are told that the {A} {N} and the {N} were {V} last {T}",
    "this {T} the {N} of the {N} was {V} by {P}",
    "the {N} at {L} is {A} and the {N} is {A}",
    "{P} {V} the {N} and the {N} for the {N}",
    "that {T} the {N} was {A} and the {N} {V} the {N}",
    "nobody {V} the {N} or the {N} so well as {P}",
    "the {N} of the {N} has not been {V} since the {T}",
    "a {N} a {N} and a {A} {N} were {V} near the {N}",
    "as the {N} was {V} the {A} {N} {V} the {N}",
    "the {A} {N} and the {N} are still the pride of {L}",
    "readers will recall the {N} that {V} the {N} and the {N} last {T}",
    "the {N} {N} was {V} and the {N} {N} {V} the {N}",
    "at {L} the {N} {N} {V} the {A} {N} {N}",
    "the {N} {N} and the {N} {N} are {A} this {T}",
)
LETTER_TEMPLATES = (
    "i write about the {A} {N} and the {N} at {L}",
    "surely the {N} should be {V} before the {N} is {V}",
    "may i ask why the {N} was {V} without a {N} or a {N}",
    "your readers will know that the {N} and the {N} are {A}",
    "when i was young the {N} and the {N} were {V} every {T}",
    "i have {V} the {N} for many a {T} and never seen such a {A} {N}",
    "the {N} near my {N} is {A} and nobody has {V} the {N}",
    "the {N} {N} and the {N} {N} were {V} again",
)
MINUTES_TEMPLATES = (
    "the {N} and the {N} were {V} by {P}",
    "{P} reported on the {A} {N} and the {N}",
    "resolved that the {N} be {V} and the {N} {V}",
    "the clerk read a letter about the {N} the {N} and the {N}",
    "it was agreed that the {A} {N} be {V} by the committee",
    "{P} asked whether the {N} had been {V} at the {N}",
    "the {N} {N} was {V} and the {N} {N} {V}",
)
SOURCES = (("gazette", 0.55), ("minutes", 0.2), ("letter", 0.25))

# --------------------------------------------------------------------------------------------
# Planted words: the gold list.
# --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Plant:
    """One planted word: where it is used before and after its onset, and how often.

    ``per_year_before`` / ``per_year_after`` are expected occurrences per year; between
    ``onset`` and ``onset + ramp_years`` the use moves linearly (shift words: the share of the
    new topic; frequency words: the log of the rate).
    """

    word: str
    kind: str
    onset: int
    from_topic: str
    to_topic: str
    per_year_before: float
    per_year_after: float
    ramp_years: int
    note: str


SHIFT_RATE = 16.0
PLANTED: tuple[Plant, ...] = (
    Plant("screen", "shift", 1970, "church", "theatre", SHIFT_RATE, SHIFT_RATE, 2,
          "The carved church screen gives way to the picture-house screen."),
    Plant("chip", "shift", 1975, "market", "signals", SHIFT_RATE, SHIFT_RATE, 2,
          "A fried chip from the market stall becomes a chip in the wireless workshop."),
    Plant("pitch", "shift", 1980, "shipyard", "sport", SHIFT_RATE, SHIFT_RATE, 2,
          "Tar pitch for caulking hulls becomes the pitch that matches are played on."),
    Plant("gig", "shift", 1985, "harbour", "theatre", SHIFT_RATE, SHIFT_RATE, 2,
          "The rowing gig of the harbour becomes a gig played by a band."),
    Plant("mouse", "shift", 1990, "farming", "signals", SHIFT_RATE, SHIFT_RATE, 2,
          "The barn mouse becomes the mouse beside the keyboard."),
    Plant("tablet", "shift", 1995, "health", "school", SHIFT_RATE, SHIFT_RATE, 2,
          "A tablet from the chemist becomes a tablet in the classroom."),
    Plant("herring", "frequency", 1960, "harbour", "harbour", 36.0, 5.4, 10,
          "Herring stays a harbour word but falls about sevenfold as the shoals fail."),
    Plant("coal", "frequency", 1962, "railway", "railway", 36.0, 5.4, 10,
          "Coal stays a railway word but falls about sevenfold as steam ends."),
    Plant("tram", "frequency", 1955, "council", "council", 36.0, 5.4, 8,
          "Tram stays a council word but falls about sevenfold after the trams close."),
    Plant("television", "frequency", 1956, "theatre", "theatre", 5.4, 36.0, 10,
          "Television stays an entertainment word but rises about sevenfold."),
    Plant("tourist", "frequency", 1972, "weather", "weather", 5.4, 36.0, 10,
          "Tourist stays a word of the beach and the weather but rises about sevenfold."),
    Plant("pension", "frequency", 1978, "council", "council", 5.4, 36.0, 10,
          "Pension stays a council word but rises about sevenfold."),
    Plant("hovercraft", "emerging", 1966, "", "harbour", 0.0, SHIFT_RATE, 3,
          "Hovercraft is not used before 1966, then is a harbour word."),
    Plant("supermarket", "emerging", 1978, "", "market", 0.0, SHIFT_RATE, 3,
          "Supermarket is not used before 1978, then is a shopping word."),
    Plant("website", "emerging", 1996, "", "signals", 0.0, SHIFT_RATE, 3,
          "Website is not used before 1996, then is a word of the signals office."),
    Plant("telegram", "fading", 1975, "signals", "", SHIFT_RATE, 0.0, 5,
          "Telegram is a signals word until 1975 and is gone from 1980."),
)

# --------------------------------------------------------------------------------------------
# Random draws: only Generator.random, consumed in fixed-size blocks.
# --------------------------------------------------------------------------------------------


class Uniforms:
    """A stream of uniform [0, 1) doubles drawn from ``np.random.default_rng(seed)``."""

    def __init__(self, seed: int, block: int = 65_536) -> None:
        self._rng = np.random.default_rng(seed)
        self._block = block
        self._values = self._rng.random(block).tolist()
        self._next = 0

    def next(self) -> float:
        if self._next == self._block:
            self._values = self._rng.random(self._block).tolist()
            self._next = 0
        value = self._values[self._next]
        self._next += 1
        return value

    def index(self, cumulative: np.ndarray) -> int:
        """An index drawn with probabilities proportional to the steps of ``cumulative``."""
        return int(np.searchsorted(cumulative, self.next() * cumulative[-1], side="right"))

    def below(self, n: int) -> int:
        """A uniform integer in [0, n)."""
        return min(int(self.next() * n), n - 1)

    def order(self, n: int) -> list[int]:
        """A random permutation of range(n)."""
        keys = [self.next() for _ in range(n)]
        return sorted(range(n), key=keys.__getitem__)


def zipf_cumulative(n: int, exponent: float) -> np.ndarray:
    """Cumulative Zipf weights for ranks 1..n."""
    return np.cumsum(1.0 / np.arange(1, n + 1, dtype=np.float64) ** exponent)


# --------------------------------------------------------------------------------------------
# Documents
# --------------------------------------------------------------------------------------------


@dataclass
class Slot:
    """A topic noun slot that planting may overwrite."""

    word: str
    topic: str


@dataclass
class Document:
    year: int
    date: str
    source: str
    topic: str
    sentences: list[list[str | Slot]] = field(default_factory=list)


class Sampler:
    """Draws words for the slots of one template from a topic (and sometimes a second one)."""

    NOUN_EXPONENT = 0.35
    OTHER_EXPONENT = 0.4

    def __init__(self, draws: Uniforms) -> None:
        self.draws = draws
        self.noun_cum = {
            t.name: zipf_cumulative(len(t.core_nouns), self.NOUN_EXPONENT) for t in TOPICS
        }
        self.verb_cum = {t.name: zipf_cumulative(len(t.verbs), self.OTHER_EXPONENT) for t in TOPICS}
        self.adj_cum = {
            t.name: zipf_cumulative(len(t.adjectives), self.OTHER_EXPONENT) for t in TOPICS
        }
        self.time_noun_cum = zipf_cumulative(len(TIME_NOUNS), self.OTHER_EXPONENT)
        self.general_verb_cum = zipf_cumulative(len(GENERAL_VERBS), self.OTHER_EXPONENT)
        self.general_adj_cum = zipf_cumulative(len(GENERAL_ADJECTIVES), self.OTHER_EXPONENT)
        self.topic_cum = np.cumsum([t.weight for t in TOPICS])
        self.source_cum = np.cumsum([w for _, w in SOURCES])

    def pick(self, words: tuple[str, ...], cumulative: np.ndarray) -> str:
        return words[self.draws.index(cumulative)]

    def noun(self, topic: Topic) -> str:
        """A core noun of the topic (Zipf), or now and then one of its rare nouns (uniform)."""
        if self.draws.next() < RARE_NOUN_SHARE_EACH * len(topic.rare_nouns):
            return topic.rare_nouns[self.draws.below(len(topic.rare_nouns))]
        return self.pick(topic.core_nouns, self.noun_cum[topic.name])

    def topic_for_slot(self, main: str, second: str | None) -> str:
        if second is not None and self.draws.next() < 0.2:
            return second
        return main

    def fill(self, template: str, main: str, second: str | None) -> list[str | Slot]:
        out: list[str | Slot] = []
        for piece in template.split():
            if not piece.startswith("{"):
                out.append(piece)
                continue
            kind = piece[1]
            if kind == "N":
                topic = TOPIC_BY_NAME[self.topic_for_slot(main, second)]
                noun = self.noun(topic)
                if out and isinstance(out[-1], Slot) and out[-1].word == noun:
                    noun = self.noun(topic)  # one more try against "the choir choir"
                out.append(Slot(noun, topic.name))
            elif kind == "V":
                if self.draws.next() < 0.65:
                    topic = TOPIC_BY_NAME[self.topic_for_slot(main, second)]
                    out.append(self.pick(topic.verbs, self.verb_cum[topic.name]))
                else:
                    out.append(self.pick(GENERAL_VERBS, self.general_verb_cum))
            elif kind == "A":
                if self.draws.next() < 0.6:
                    topic = TOPIC_BY_NAME[self.topic_for_slot(main, second)]
                    out.append(self.pick(topic.adjectives, self.adj_cum[topic.name]))
                else:
                    out.append(self.pick(GENERAL_ADJECTIVES, self.general_adj_cum))
            elif kind == "T":
                out.append(self.pick(TIME_NOUNS, self.time_noun_cum))
            elif kind == "P":
                out.extend(self.person().split())
            elif kind == "L":
                out.extend(PLACE_OF_TOPIC[main].split())
            else:
                raise ValueError(f"unknown slot {piece} in template {template!r}")
        return out

    def person(self) -> str:
        title = TITLES[self.draws.below(len(TITLES))]
        return f"{title} {SURNAMES[self.draws.below(len(SURNAMES))]}"


def date_in_year(draws: Uniforms, year: int) -> str:
    """An ISO date drawn uniformly within the year."""
    start = np.datetime64(f"{year}-01-01")
    days = int((np.datetime64(f"{year + 1}-01-01") - start).astype(int))
    return str(start + np.timedelta64(draws.below(days), "D"))


def make_document(sampler: Sampler, year: int, main: str) -> Document:
    """One document about ``main``: a source, sometimes a second topic, and 40-200 tokens."""
    draws = sampler.draws
    source = SOURCES[draws.index(sampler.source_cum)][0]
    second = None
    if draws.next() < 0.2:
        second = TOPICS[draws.index(sampler.topic_cum)].name
        second = None if second == main else second
    doc = Document(year, date_in_year(draws, year), source, main)
    target = 40 + draws.below(161)
    templates = {"gazette": GAZETTE_TEMPLATES, "letter": LETTER_TEMPLATES,
                 "minutes": MINUTES_TEMPLATES}[source]
    length = 0
    if source == "minutes":
        committee = COMMITTEE_OF_TOPIC[main]
        opening = f"minutes of the {committee} committee held at the town hall".split()
        present = ["present"] + sampler.person().split() + ["and"] + sampler.person().split()
        doc.sentences += [opening, present]
        length += len(opening) + len(present)
    elif source == "letter":
        who = GENERAL_NOUNS[draws.below(len(GENERAL_NOUNS))]
        opening = f"i write as a {who} of this town of many years standing".split()
        doc.sentences += [["sir"], opening]
        length += 1 + len(opening)
    while length < target:
        sentence = sampler.fill(templates[draws.below(len(templates))], main, second)
        doc.sentences.append(sentence)
        length += len(sentence)
    if source == "minutes":
        weekday = WEEKDAYS[draws.below(len(WEEKDAYS))]
        month = MONTHS[draws.below(len(MONTHS))]
        doc.sentences.append(
            f"the next meeting will be held on the first {weekday} of {month}".split())
    if source == "letter":
        closing = ["yours", "faithfully", LETTER_SIGNATURES[draws.below(len(LETTER_SIGNATURES))]]
        closing += PLACE_OF_TOPIC[main].split()
        doc.sentences.append(closing)
    return doc


#: About how many of a topic's own noun slots its documents hold per token (measured).
OWN_NOUN_SLOTS_PER_TOKEN = 0.15
#: The share of its planted words' slots that a topic gets back as extra tokens. Half keeps
#: both its other nouns and its verbs and adjectives within about 15% of their rates while
#: planted words come and go (none lets the nouns fall, all lets the verbs rise).
PLANTED_ROOM = 0.5


def topic_budgets(year: int) -> dict[str, float]:
    """Tokens each topic gets in ``year``: its weight's share, plus room for its planted words.

    Planted words overwrite noun slots of their topic; each topic gets extra tokens for half
    of the slots its planted words take that year (PLANTED_ROOM). The total stays
    TOKENS_PER_YEAR.
    """
    planted_uses: Counter = Counter()
    for plant in PLANTED:
        planted_uses.update(expected_uses(plant, year))
    total_weight = sum(t.weight for t in TOPICS)
    wanted = {t.name: TOKENS_PER_YEAR * t.weight / total_weight
              + PLANTED_ROOM * planted_uses[t.name] / OWN_NOUN_SLOTS_PER_TOKEN for t in TOPICS}
    scale = TOKENS_PER_YEAR / sum(wanted.values())
    return {name: tokens * scale for name, tokens in wanted.items()}


def make_year(sampler: Sampler, year: int) -> list[Document]:
    """Documents for one year, in date order: about TOKENS_PER_YEAR tokens, each topic its budget.

    Every topic gets its budget of the year's tokens (``topic_budgets``), so that each year
    has enough documents of every topic to carry the planted words.
    """
    docs: list[Document] = []
    target = 0.0
    tokens = 0
    for topic, budget in topic_budgets(year).items():
        target += budget
        while tokens < target:
            doc = make_document(sampler, year, topic)
            docs.append(doc)
            tokens += sum(len(s) for s in doc.sentences)
    docs.sort(key=lambda d: d.date)
    return docs


# --------------------------------------------------------------------------------------------
# Planting
# --------------------------------------------------------------------------------------------


def ramp_share(plant: Plant, year: int) -> float:
    """How far the change has gone in ``year``: 0 before the onset, 1 after the ramp."""
    if year < plant.onset:
        return 0.0
    return min(1.0, (year - plant.onset + 1) / (plant.ramp_years + 1))


def expected_uses(plant: Plant, year: int) -> dict[str, float]:
    """Expected occurrences of the planted word in ``year``, per topic."""
    share = ramp_share(plant, year)
    if plant.kind == "shift":
        return {plant.from_topic: plant.per_year_before * (1 - share),
                plant.to_topic: plant.per_year_after * share}
    if plant.kind == "frequency":
        log_rate = (1 - share) * np.log(plant.per_year_before) + share * np.log(
            plant.per_year_after)
        return {plant.from_topic: float(np.exp(log_rate))}
    if plant.kind == "emerging":
        return {plant.to_topic: plant.per_year_after * share}
    if plant.kind == "fading":
        return {plant.from_topic: plant.per_year_before * (1 - share)}
    raise ValueError(f"unknown kind {plant.kind}")


def plant_words(draws: Uniforms, docs: list[Document], year: int) -> None:
    """Overwrite randomly chosen topic noun slots of ``year`` with the planted words.

    A planted word only goes into a slot of its topic inside a document whose main topic is
    that topic, so its contexts are that topic's words.
    """
    slots: dict[str, list[Slot]] = {t.name: [] for t in TOPICS}
    for doc in docs:
        for sentence in doc.sentences:
            for piece in sentence:
                if isinstance(piece, Slot) and piece.topic == doc.topic:
                    slots[piece.topic].append(piece)
    queues = {name: iter([found[i] for i in draws.order(len(found))])
              for name, found in slots.items()}
    for plant in PLANTED:
        for topic, expected in expected_uses(plant, year).items():
            # about +-20% from year to year, then stochastic rounding
            count = int(expected * (0.8 + 0.4 * draws.next()) + draws.next())
            for slot in itertools.islice(queues[topic], count):
                slot.word = plant.word


# --------------------------------------------------------------------------------------------
# Rendering and files
# --------------------------------------------------------------------------------------------

#: Words written with a capital letter.
PROPER = (
    set(SURNAMES)
    | set(LETTER_SIGNATURES)
    | set(WEEKDAYS)
    | set(MONTHS)
    | {w for place in PLACES for w in place.split() if w != "the"}
)
TITLE_CASE = {"mr": "Mr", "mrs": "Mrs", "miss": "Miss", "alderman": "Alderman",
              "councillor": "Councillor", "captain": "Captain", "doctor": "Dr",
              "reverend": "Rev", "i": "I"}


def render_sentence(pieces: list[str | Slot]) -> str:
    words = [p.word if isinstance(p, Slot) else p for p in pieces]
    out: list[str] = []
    for i, word in enumerate(words):
        if word == "a" and i + 1 < len(words) and words[i + 1][0] in "aeiou":
            word = "an"
        if word in TITLE_CASE and (word == "i" or (i + 1 < len(words) and words[i + 1] in PROPER)):
            word = TITLE_CASE[word]
        elif word in PROPER:
            word = word.capitalize()
        out.append(word)
    out[0] = out[0][0].upper() + out[0][1:]
    return " ".join(out)


def render_document(doc: Document) -> str:
    """The document's text: sentences with capitals and full stops (commas in letters)."""
    parts = []
    for i, sentence in enumerate(doc.sentences):
        text = render_sentence(sentence)
        if doc.source == "letter" and i == 0:
            parts.append(text + ",")
        elif doc.source == "letter" and i == len(doc.sentences) - 1:
            words = text.split()  # Yours faithfully NAME PLACE...
            parts.append(f"{' '.join(words[:2])}, {words[2]}, {' '.join(words[3:])}.")
        elif doc.source == "minutes" and i == 1:
            parts.append(text.replace("Present ", "Present: ", 1) + ".")
        else:
            parts.append(text + ".")
    return " ".join(parts)


def tokens_of(text: str) -> list[str]:
    """drift's default tokenization: lower-cased ``\\w+`` matches."""
    return TOKEN_PATTERN.findall(text.lower())


def generate_rows(seed: int = SEED) -> list[dict[str, str]]:
    """All documents of the archive as CSV rows (id, date, source, text), in date order."""
    draws = Uniforms(seed)
    sampler = Sampler(draws)
    rows: list[dict[str, str]] = []
    for year in range(FIRST_YEAR, LAST_YEAR + 1):
        docs = make_year(sampler, year)
        plant_words(draws, docs, year)
        for doc in docs:
            rows.append({"id": f"pm-{len(rows) + 1:05d}", "date": doc.date, "source": doc.source,
                         "text": render_document(doc)})
    return rows


def csv_bytes(rows: list[dict[str, str]]) -> bytes:
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=["id", "date", "source", "text"],
                            lineterminator="\n")
    writer.writeheader()
    writer.writerows(rows)
    return buffer.getvalue().encode("utf-8")


def gzip_bytes(data: bytes) -> bytes:
    """gzip with no file name and mtime 0, so the same data gives the same bytes."""
    out = io.BytesIO()
    with gzip.GzipFile(filename="", mode="wb", fileobj=out, mtime=0, compresslevel=9) as gz:
        gz.write(data)
    return out.getvalue()


def decade_of(year: int) -> str:
    return f"{year // 10 * 10}s"


def archive_counts(rows: list[dict[str, str]], csv_data: bytes, seed: int) -> dict:
    """Documents, tokens and types per year, per decade and in all; planted words per decade.

    Tokens are counted the way drift does by default (see ``tokens_of``), so an end-to-end test
    can hold ``drift slice``'s summary against these figures.
    """
    vocab: dict[str, set[str]] = {}
    totals: dict[str, dict[str, int]] = {}
    planted_words = {p.word for p in PLANTED}
    planted: dict[str, Counter] = {w: Counter() for w in sorted(planted_words)}
    for row in rows:
        year = row["date"][:4]
        decade = decade_of(int(year))
        tokens = tokens_of(row["text"])
        for key in (year, decade, "all"):
            bucket = totals.setdefault(key, {"documents": 0, "tokens": 0})
            bucket["documents"] += 1
            bucket["tokens"] += len(tokens)
            vocab.setdefault(key, set()).update(tokens)
        for token in tokens:
            if token in planted_words:
                planted[token][decade] += 1
    for key, bucket in totals.items():
        bucket["types"] = len(vocab[key])
    years = {k: v for k, v in totals.items() if len(k) == 4 and k.isdigit()}
    decades = {k: v for k, v in totals.items() if k.endswith("0s")}
    return {
        "seed": seed,
        "tokenization": "lower-cased \\w+ matches (Python re, Unicode)",
        "csv_sha256": hashlib.sha256(csv_data).hexdigest(),
        "all": totals["all"],
        "decades": decades,
        "years": years,
        "planted_counts": {w: {d: planted[w][d] for d in decades} for w in planted},
    }


def planted_rows() -> list[dict[str, str]]:
    return [{"word": p.word, "kind": p.kind, "onset": str(p.onset), "from_topic": p.from_topic,
             "to_topic": p.to_topic, "note": p.note} for p in PLANTED]


def planted_csv_bytes() -> bytes:
    buffer = io.StringIO()
    writer = csv.DictWriter(buffer, fieldnames=["word", "kind", "onset", "from_topic",
                                                "to_topic", "note"], lineterminator="\n")
    writer.writeheader()
    writer.writerows(planted_rows())
    return buffer.getvalue().encode("utf-8")


def topic_vocabulary() -> dict[str, tuple[str, ...]]:
    """Every word list by name (topics and the shared lists), for checks."""
    lists: dict[str, tuple[str, ...]] = {}
    for topic in TOPICS:
        lists[f"{topic.name}.nouns"] = topic.nouns
        lists[f"{topic.name}.verbs"] = topic.verbs
        lists[f"{topic.name}.adjectives"] = topic.adjectives
    lists["general.nouns"] = GENERAL_NOUNS
    lists["time.nouns"] = TIME_NOUNS
    lists["general.verbs"] = GENERAL_VERBS
    lists["general.adjectives"] = GENERAL_ADJECTIVES
    lists["weekdays"] = WEEKDAYS
    lists["months"] = MONTHS
    lists["places"] = tuple(w for place in PLACES for w in place.split() if w != "the")
    lists["titles"] = TITLES
    lists["surnames"] = SURNAMES
    lists["letter signatures"] = LETTER_SIGNATURES
    return lists


def vocabulary_problems() -> list[str]:
    """Words found in more than one list, or planted words found in any list."""
    seen: dict[str, str] = {}
    problems = []
    for name, words in topic_vocabulary().items():
        for word in words:
            if word in seen and seen[word] != name:
                problems.append(f"{word} in {seen[word]} and {name}")
            seen.setdefault(word, name)
    for plant in PLANTED:
        if plant.word in seen:
            problems.append(f"planted {plant.word} also in {seen[plant.word]}")
    return problems


def iter_outputs(seed: int) -> Iterator[tuple[str, bytes]]:
    """(file name, content) of every generated file."""
    rows = generate_rows(seed)
    data = csv_bytes(rows)
    yield "archive.csv.gz", gzip_bytes(data)
    yield "planted.csv", planted_csv_bytes()
    counts = archive_counts(rows, data, seed)
    yield "counts.json", (json.dumps(counts, indent=1) + "\n").encode("utf-8")


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seed", type=int, default=SEED, help=f"random seed (default {SEED})")
    parser.add_argument("--out", type=Path, default=Path(__file__).resolve().parent,
                        help="folder to write into (default: beside this script)")
    args = parser.parse_args(argv)
    problems = vocabulary_problems()
    if problems:
        raise SystemExit("vocabulary lists overlap: " + "; ".join(problems))
    args.out.mkdir(parents=True, exist_ok=True)
    for name, content in iter_outputs(args.seed):
        (args.out / name).write_bytes(content)
        print(f"wrote {args.out / name} ({len(content):,} bytes)")


if __name__ == "__main__":
    main()
