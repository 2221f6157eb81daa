#!/usr/bin/env python3
"""Generate the invented multi-register corpus for the bundled tiny model.

Scenario (entirely invented): the Teneth Ridges, a coastal range where a
cooperative, the Teneth Fogwater Compact, runs stations of mesh nets that comb
drinking water out of sea fog into cisterns; carts carry the water down to the
valley. Every name of a person, place, bird and part is made up from random
syllables or plain words.

Five registers, deliberately different so experts can specialise:
  log       terse station telemetry, one reading per line
  table     fixed-width numeric tables (weekly yields, daily ledgers, cart runs)
  notes     first-person prose field notes by a keeper
  radio     two-party radio dialogue between valley dispatch and a keeper
  ticket    maintenance tickets in key: value form

Output (deterministic for a given --seed; same bytes every run):
  OUT/train.txt    about 95 % of the documents
  OUT/heldout.txt  about 5 % of the documents (whole documents, all registers)
  OUT/stats.json   sizes and document counts per register

Each document starts with the literal marker ``<doc>`` (the tokenizer's special
token, id 0) directly followed by its text; documents end with a newline.

Usage: python scripts/make_corpus.py [--seed 1234] [--out data/corpus] [--mb 4.0]
"""

from __future__ import annotations

import argparse
import json
import os
import random
import time
from dataclasses import dataclass, field
from pathlib import Path

DOC_MARK = "<doc>"

# ---------------------------------------------------------------- names

_ONSETS = ["b", "br", "d", "dr", "f", "g", "gr", "h", "k", "kr", "l", "m", "n", "p",
           "r", "s", "sk", "st", "t", "th", "tr", "v", "w", "z", "ss", "ll"]
_VOWELS = ["a", "e", "i", "o", "u", "a", "e", "o", "ae", "ei", "ou", "ia"]
_CODAS = ["", "", "", "n", "r", "l", "s", "th", "m", "rk", "nd", "sk", "ll", "v"]
_ACCENTED = {"e": "é", "o": "ö", "a": "à"}


def make_name(rng: random.Random, syllables: int, accent_p: float = 0.0) -> str:
    parts = []
    for i in range(syllables):
        onset = rng.choice(_ONSETS) if (i > 0 or rng.random() < 0.85) else ""
        vowel = rng.choice(_VOWELS)
        coda = rng.choice(_CODAS) if i == syllables - 1 or rng.random() < 0.3 else ""
        parts.append(onset + vowel + coda)
    word = "".join(parts)
    if accent_p and rng.random() < accent_p:
        idx = [i for i, ch in enumerate(word) if ch in _ACCENTED]
        if idx:
            i = idx[-1]
            word = word[:i] + _ACCENTED[word[i]] + word[i + 1:]
    return word.capitalize()


def unique_names(rng: random.Random, n: int, lo: int, hi: int, accent_p: float,
                 taken: set[str], max_len: int = 9) -> list[str]:
    out: list[str] = []
    while len(out) < n:
        name = make_name(rng, rng.randint(lo, hi), accent_p)
        if 4 <= len(name) <= max_len and name not in taken:
            taken.add(name)
            out.append(name)
    return out


# ---------------------------------------------------------------- world


@dataclass
class Person:
    first: str
    last: str
    role: str

    @property
    def full(self) -> str:
        return f"{self.first} {self.last}"

    @property
    def short(self) -> str:
        return f"{self.first[0]}.{self.last}"


@dataclass
class Station:
    code: str
    name: str
    ridge: str
    nets: int
    cistern_l: int
    keeper: Person | None = None


@dataclass
class World:
    ridges: list[str]
    stations: list[Station]
    keepers: list[Person]
    dispatchers: list[Person]
    drivers: list[Person]
    engineers: list[Person]
    birds: list[str]
    valley: str
    harbour: str
    carts: list[str] = field(default_factory=list)


def build_world(rng: random.Random) -> World:
    taken: set[str] = set()
    ridges = unique_names(rng, 5, 2, 2, 0.0, taken, max_len=8)
    stations: list[Station] = []
    n = 1
    for ridge in ridges:
        for _ in range(rng.randint(4, 6)):
            stations.append(Station(
                code=f"TF-{n:02d}", name=unique_names(rng, 1, 2, 3, 0.1, taken)[0],
                ridge=ridge, nets=rng.randint(4, 9), cistern_l=rng.choice([4000, 5000, 6000, 8000])))
            n += 1
    n_people = len(stations) + 9
    firsts = unique_names(rng, n_people, 2, 2, 0.25, taken, max_len=7)
    lasts = unique_names(rng, n_people, 2, 3, 0.2, taken, max_len=9)
    people = [Person(f, la, "") for f, la in zip(firsts, lasts, strict=True)]
    keepers = people[: len(stations)]
    for st, p in zip(stations, keepers, strict=False):
        p.role = "keeper"
        st.keeper = p
    rest = people[len(stations):]
    dispatchers, drivers, engineers = rest[:3], rest[3:7], rest[7:9]
    for p in dispatchers:
        p.role = "dispatch"
    for p in drivers:
        p.role = "driver"
    for p in engineers:
        p.role = "engineer"
    colours = ["grey", "collared", "long-tailed", "pale", "speckled", "black-capped", "dun"]
    birds = [f"{rng.choice(colours)} {make_name(rng, 2).lower()}" for _ in range(7)]
    valley, harbour = unique_names(rng, 2, 2, 3, 0.3, taken)
    carts = [f"C-{i}" for i in range(1, 7)]
    return World(ridges, stations, keepers, dispatchers, drivers, engineers, birds,
                 valley, harbour, carts)


# ---------------------------------------------------------------- weather

FOG_LEVELS = ["none", "thin", "patchy", "dense", "heavy"]
FOG_FLOW = [0.0, 0.12, 0.31, 0.58, 0.86]  # litres per minute per net, rough
FOG_VIS = [4000, 900, 300, 80, 30]
COMPASS = ["north", "north-east", "east", "south-east", "south", "south-west", "west", "north-west"]


@dataclass
class Day:
    cycle: int
    day: int
    fog: int
    wind: float
    direction: int
    air: float
    cist: float  # percent at dawn
    cond: int    # µS/cm

    @property
    def week(self) -> int:
        return (self.day - 1) // 7 + 1


def draw_day(rng: random.Random) -> Day:
    fog = rng.choices(range(5), weights=[1, 2, 3, 3, 2])[0]
    return Day(
        cycle=rng.randint(14, 19), day=rng.randint(1, 360), fog=fog,
        wind=round(rng.uniform(0.5, 3.0) + (4 - fog) * rng.uniform(0.3, 1.6), 1),
        direction=rng.choice([190, 200, 210, 220, 230, 240, 250, 260]) + rng.randint(-9, 9),
        air=round(rng.uniform(6.0, 15.0) - fog * 0.6, 1),
        cist=round(rng.uniform(25.0, 85.0), 1), cond=rng.randint(18, 60))


def compass(deg: int) -> str:
    return COMPASS[int(((deg % 360) + 22.5) // 45) % 8]


_UNITS = ["zero", "one", "two", "three", "four", "five", "six", "seven", "eight", "nine",
          "ten", "eleven", "twelve", "thirteen", "fourteen", "fifteen", "sixteen",
          "seventeen", "eighteen", "nineteen"]
_TENS = ["", "", "twenty", "thirty", "forty", "fifty", "sixty", "seventy", "eighty", "ninety"]


def words(n: int) -> str:
    if n < 20:
        return _UNITS[n]
    if n < 100:
        t, u = divmod(n, 10)
        return _TENS[t] + ("" if u == 0 else "-" + _UNITS[u])
    if n == 100:
        return "a hundred"
    h, r = divmod(n, 100)
    return _UNITS[h] + " hundred" + ("" if r == 0 else " and " + words(r))


def clock(minutes: int) -> str:
    minutes %= 24 * 60
    return f"{minutes // 60:02d}:{minutes % 60:02d}"


# ---------------------------------------------------------------- register: log


def doc_log(rng: random.Random, w: World) -> str:
    st = rng.choice(w.stations)
    d = draw_day(rng)
    step = rng.choice([5, 10, 15])
    t = rng.randint(3 * 60, 7 * 60) // step * step
    n = rng.randint(18, 44)
    fog, wind, direction, air = d.fog, d.wind, d.direction, d.air
    cist, cond = d.cist, d.cond
    rh = 70 + fog * 7
    lines = [f"== log {st.code} {st.name} | ridge {st.ridge} | cycle {d.cycle} day {d.day} | every {step} min =="]
    pump_fault = False
    for _ in range(n):
        if rng.random() < 0.08:
            fog = max(0, min(4, fog + rng.choice([-1, 1])))
        wind = max(0.0, round(wind + rng.uniform(-0.4, 0.4), 1))
        direction = (direction + rng.randint(-4, 4)) % 360
        air = round(air + rng.uniform(-0.2, 0.25), 1)
        rh = max(55, min(100, 70 + fog * 7 + rng.randint(-2, 2)))
        vis = max(10, int(FOG_VIS[fog] * rng.uniform(0.8, 1.2)) // 10 * 10)
        flow = 0.0 if pump_fault else FOG_FLOW[fog] * st.nets * rng.uniform(0.85, 1.15)
        cist = min(100.0, cist + flow * step / st.cistern_l * 100)
        cond = max(8, cond + rng.randint(-1, 1))
        lines.append(
            f"{clock(t)} fog={FOG_LEVELS[fog]} vis={vis}m wind={wind:.1f}m/s {direction:03d}° "
            f"air={air:.1f}°C rh={rh}% flow={flow:.2f}L/min cist={cist:.1f}% cond={cond}µS/cm")
        r = rng.random()
        if cist > 90 and rng.random() < 0.5:
            lines.append(f"{clock(t)} WARN cist={cist:.1f}% above 90%, overflow valve open")
        elif r < 0.025 and not pump_fault:
            pump_fault = True
            lines.append(f"{clock(t)} ERR pump_{rng.randint(1, 2)} stall code E{rng.choice([41, 42, 57])}, flow lost")
        elif r < 0.06 and pump_fault:
            pump_fault = False
            who = st.keeper.short if st.keeper else "keeper"
            lines.append(f"{clock(t)} ACK {who} pump reset, flow restored")
        elif r < 0.09:
            drawn = rng.choice([400, 600, 800, 1000, 1200])
            if cist * st.cistern_l / 100 > drawn + 200:
                cist -= drawn / st.cistern_l * 100
                lines.append(f"{clock(t)} INFO cart {rng.choice(w.carts)} drew {drawn}L, cist now {cist:.1f}%")
        elif r < 0.11:
            lines.append(f"{clock(t)} INFO net {rng.randint(1, st.nets)} tension reset {rng.randint(30, 60)}N")
        elif r < 0.125:
            lines.append(f"{clock(t)} WARN cond={cond}µS/cm sample flagged for taste check")
        t += step
    lines.append(f"== end {st.code} {n} records ==")
    return "\n".join(lines) + "\n"


# ---------------------------------------------------------------- register: table


def _row(cells: list[str], widths: list[int]) -> str:
    out = [cells[0].ljust(widths[0])] + [c.rjust(wd) for c, wd in zip(cells[1:], widths[1:], strict=True)]
    return " | ".join(out).rstrip()


def _rule(widths: list[int]) -> str:
    return "-+-".join("-" * wd for wd in widths)


def table_weekly(rng: random.Random, w: World) -> str:
    ridge = rng.choice(w.ridges)
    d = draw_day(rng)
    sts = [s for s in w.stations if s.ridge == ridge]
    head = ["station", "nets", "fog h", "yield L", "L/m²", "cist %"]
    widths = [16, 4, 6, 8, 5, 6]
    rows, tn, tf, ty = [], 0, 0.0, 0.0
    base_fog = rng.uniform(15, 70)
    for s in sts:
        fog_h = round(max(0.0, base_fog + rng.uniform(-8, 8)), 1)
        rate = rng.uniform(0.055, 0.075)
        yl = round(fog_h * s.nets * 60 * rate * rng.uniform(0.9, 1.1) / 10, 1) * 10 / 10
        area = s.nets * 6.0
        rows.append(_row([f"{s.code} {s.name}", str(s.nets), f"{fog_h:.1f}", f"{yl:.1f}",
                          f"{yl / area / 7:.2f}", str(rng.randint(30, 98))], widths))
        tn, tf, ty = tn + s.nets, tf + fog_h, ty + yl
    who = rng.choice(w.dispatchers)
    lines = [f"## Weekly yield – ridge {ridge} – cycle {d.cycle}, week {d.week}",
             f"filed by {who.full}, valley dispatch", "",
             _row(head, widths), _rule(widths), *rows, _rule(widths),
             _row(["total", str(tn), f"{tf:.1f}", f"{ty:.1f}", f"{ty / (tn * 6.0) / 7:.2f}", "–"], widths)]
    if rng.random() < 0.5:
        lines += ["", f"note: fog hours are counted when vis < 300 m; {rng.choice(['no', 'one', 'two'])} station(s) reported pump faults."]
    return "\n".join(lines) + "\n"


def table_daily(rng: random.Random, w: World) -> str:
    st = rng.choice(w.stations)
    d = draw_day(rng)
    head = ["day", "fog", "fog h", "yield L", "drawn L", "cist %", "µS/cm"]
    widths = [4, 6, 5, 7, 7, 6, 5]
    cist, cond, fog = d.cist, d.cond, d.fog
    lines = [f"## Daily ledger – {st.code} {st.name} ({st.ridge}) – cycle {d.cycle}, days {d.day}–{d.day + 13}",
             f"keeper: {st.keeper.full if st.keeper else 'vacant'}; cistern {st.cistern_l} L; {st.nets} nets", "",
             _row(head, widths), _rule(widths)]
    for i in range(14):
        if rng.random() < 0.35:
            fog = max(0, min(4, fog + rng.choice([-1, 1])))
        fog_h = round([0, 2, 5, 9, 13][fog] + rng.uniform(0, 3), 1) if fog else 0.0
        yl = round(fog_h * 60 * FOG_FLOW[fog] * st.nets * rng.uniform(0.85, 1.1), 1)
        drawn = rng.choice([0, 0, 400, 800, 1200, 1600] if cist < 80 else [800, 1200, 1600, 2000])
        cist = cist + (yl - drawn) / st.cistern_l * 100
        if cist < 5:
            drawn, cist = 0, cist + drawn / st.cistern_l * 100
        cist = min(100.0, cist)
        cond = max(8, cond + rng.randint(-2, 2))
        lines.append(_row([str(d.day + i), FOG_LEVELS[fog], f"{fog_h:.1f}", f"{yl:.1f}", str(drawn),
                           f"{cist:.1f}", str(cond)], widths))
    return "\n".join(lines) + "\n"


def table_carts(rng: random.Random, w: World) -> str:
    d = draw_day(rng)
    head = ["cart", "driver", "from", "load L", "depart", "arrive"]
    widths = [4, 17, 16, 6, 6, 6]
    lines = [f"## Cart runs to {w.valley} – cycle {d.cycle}, day {d.day}", "",
             _row(head, widths), _rule(widths)]
    t = rng.randint(5 * 60, 7 * 60)
    total = 0
    for _ in range(rng.randint(5, 12)):
        st = rng.choice(w.stations)
        drv = rng.choice(w.drivers)
        load = rng.choice([400, 600, 800, 1000, 1200])
        dur = rng.randint(35, 110)
        lines.append(_row([rng.choice(w.carts), drv.full, f"{st.code} {st.name}", str(load),
                           clock(t), clock(t + dur)], widths))
        total += load
        t += rng.randint(10, 50)
    lines += [_rule(widths), _row(["sum", "", "", str(total), "", ""], widths)]
    return "\n".join(lines) + "\n"


def doc_table(rng: random.Random, w: World) -> str:
    kinds = [table_weekly, table_daily, table_carts]
    parts = [rng.choice(kinds)(rng, w) for _ in range(rng.randint(1, 3))]
    return "\n".join(parts)


# ---------------------------------------------------------------- register: field notes

FOG_ADJ = ["no fog at all", "a thin veil of fog", "patchy fog", "dense fog", "heavy fog"]
FOG_MOOD = [
    ["The ridge was bare and bright", "Not a wisp of fog all morning", "The sea lay flat and clear below us"],
    ["A thin grey veil hung over the saddle", "The fog barely touched the upper nets", "There was fog, but only just"],
    ["Fog came and went in patches", "Banks of fog drifted across the saddle", "The fog kept breaking and closing again"],
    ["The fog was thick and steady", "Fog filled the whole saddle", "We worked inside a wall of fog"],
    ["The fog was so heavy I lost sight of the lower nets", "Heavy fog rolled in off the sea", "The fog pressed down like wet wool"],
]
NET_STATE = [
    ["the nets hung dry", "the mesh stayed dry and slack", "the gutters were empty"],
    ["the nets beaded slowly", "only the top strands held any water", "the gutters ran in a thin trickle"],
    ["the nets dripped in bursts", "the gutters ran unevenly", "the mesh filled and emptied with each bank"],
    ["the nets streamed", "the gutters ran steadily", "water ran off the mesh in sheets"],
    ["the nets poured", "the gutters overflowed twice", "the mesh sagged under the weight of water"],
]
TASKS = [
    "I replaced two clips on net {net} and reset its tension",
    "I walked the line from net 1 to net {nets} and found nothing torn",
    "I cleared salt crust from the lower gutter of net {net}",
    "I flushed the settling tank and scrubbed the inlet screen",
    "I took a water sample for the conductivity check: {cond} µS/cm, which is {condword}",
    "I greased the pump bearings and checked the float switch",
    "I patched a small tear in net {net} with spare mesh",
    "I counted the spare clips: {clips} left in the crate",
    "I tightened the guy lines on the windward poles",
    "I logged the cistern at {cist} percent before the cart came",
]
COND_WORD = ["very soft", "soft and clean", "well within the limit", "a little salty", "close to the limit"]
BIRD_LINES = [
    "A pair of {bird}s sat on the top strand of net {net} for most of the morning.",
    "The {bird}s were calling from the rocks below the cistern.",
    "I saw a single {bird} drinking from the overflow channel.",
    "No birds at all today, which is unusual for this time of the cycle.",
    "A flock of {bird}s went over towards {ridge2}, very low.",
]
PEOPLE_LINES = [
    "{driver} came up with cart {cart} at {time} and took {load} litres down to {valley}.",
    "{driver} was late with the cart; the track below the saddle is washed out again.",
    "{eng} came by to look at the pump and promised new seals within the week.",
    "I spoke to {disp} on the radio twice; dispatch wants the weekly figures early.",
    "{keeper2} from {station2} walked over to borrow a coil of wire.",
    "Nobody came up today. The ridge was quiet apart from the wind.",
]
REFLECT = [
    "It is strange how much of this work is simply waiting for the weather.",
    "The old hands say the fog is thickest in the weeks after the spring tides, and so far they are right.",
    "I keep thinking the nets on the lee side are wasted; they catch half what the windward ones do.",
    "I slept badly and the wind rattled the hut all night.",
    "Tomorrow I will start on the gutter repairs if the fog allows it.",
    "The water tastes of nothing at all, which is exactly how it should taste.",
    "I ate cold lentils and watched the fog bank roll up the slope.",
    "I should write to {keeper2} about the spare pump before the dry weeks come.",
]
WIND_LINES = [
    "Wind from the {dirword} at about {wind} m/s, air {air} °C.",
    "The wind held {dirword}, {wind} m/s or so, and the air stayed near {air} °C.",
    "A {windword} wind from the {dirword}; the thermometer read {air} °C at dawn.",
]


def _windword(v: float) -> str:
    return "still" if v < 1.5 else "light" if v < 4 else "steady" if v < 7 else "strong"


def doc_notes(rng: random.Random, w: World) -> str:
    st = rng.choice(w.stations)
    d = draw_day(rng)
    keeper = st.keeper or rng.choice(w.keepers)
    other = rng.choice([s for s in w.stations if s is not st])
    slots = {
        "net": str(rng.randint(1, st.nets)), "nets": str(st.nets), "cond": str(d.cond),
        "condword": COND_WORD[min(4, d.cond // 13)], "clips": str(rng.randint(3, 60)),
        "cist": words(int(d.cist)), "bird": rng.choice(w.birds), "ridge2": rng.choice(w.ridges),
        "driver": rng.choice(w.drivers).full, "cart": rng.choice(w.carts),
        "time": clock(rng.randint(6 * 60, 16 * 60) // 5 * 5), "load": str(rng.choice([400, 600, 800, 1000])),
        "valley": w.valley, "eng": rng.choice(w.engineers).full, "disp": rng.choice(w.dispatchers).full,
        "keeper2": (other.keeper.full if other.keeper else "the relief keeper"), "station2": other.name,
        "dirword": compass(d.direction), "wind": f"{d.wind:.1f}", "air": f"{d.air:.1f}",
        "windword": _windword(d.wind)}
    hdr = [f"Field notes — {keeper.full}, keeper at {st.name} ({st.code}), ridge {st.ridge}",
           f"Cycle {d.cycle}, day {d.day}.", ""]
    paras = []
    # weather paragraph
    s = [f"{rng.choice(FOG_MOOD[d.fog])}, and {rng.choice(NET_STATE[d.fog])}.",
         rng.choice(WIND_LINES).format(**slots)]
    if d.fog >= 3:
        s.append(f"By {clock(rng.randint(8 * 60, 11 * 60) // 5 * 5)} the cistern had passed {words(min(99, int(d.cist) + rng.randint(5, 15)))} percent.")
    elif d.fog == 0:
        s.append("The cistern did not move all day.")
    paras.append(" ".join(s))
    # work paragraph
    tasks = rng.sample(TASKS, rng.randint(2, 4))
    work = []
    for i, tk in enumerate(tasks):
        lead = ["First", "Then", "After that", "Later", "Before dark"][min(i, 4)] if i < 4 else "Finally"
        sent = tk.format(**slots)
        work.append(f"{lead} {sent}." if i else f"{sent}.")
    paras.append(" ".join(work))
    # people / birds / reflections
    extra = [rng.choice(PEOPLE_LINES).format(**slots)]
    if rng.random() < 0.7:
        extra.append(rng.choice(BIRD_LINES).format(**slots))
    extra.append(rng.choice(REFLECT).format(**slots))
    rng.shuffle(extra)
    paras.append(" ".join(extra))
    if rng.random() < 0.4:
        paras.append(rng.choice(REFLECT).format(**slots))
    return "\n".join(hdr) + "\n" + "\n\n".join(paras) + "\n"


# ---------------------------------------------------------------- register: radio


def doc_radio(rng: random.Random, w: World) -> str:
    st = rng.choice(w.stations)
    d = draw_day(rng)
    disp = rng.choice(w.dispatchers)
    keeper = st.keeper or rng.choice(w.keepers)
    D, K = f"DISPATCH {disp.first}:", f"{st.name.upper()} {keeper.first}:"
    t = rng.randint(5 * 60, 19 * 60)
    cist = int(d.cist)
    lines = [f"[radio, channel {rng.randint(2, 7)}, cycle {d.cycle} day {d.day}, {clock(t)}]"]
    lines.append(f"{D} {rng.choice([f'{st.name}, {st.name}, this is valley dispatch.', f'Valley dispatch calling {st.name}, over.', f'{st.name}, dispatch here, do you read?'])}")
    lines.append(f"{K} {rng.choice([f'Dispatch, {st.name}. Reading you clear, go ahead.', f'{st.name} here, loud and clear.', f'Go ahead dispatch, this is {keeper.first}.'])}")
    topics = ["status", "cart", "parts", "weather", "fault", "chat"]
    chosen = ["status"] + rng.sample(topics[1:], rng.randint(1, 3))
    for topic in chosen:
        if topic == "status":
            lines.append(f"{D} {rng.choice(['How is the cistern?', 'What is your cistern level?', 'Give me your level and the fog, please.'])}")
            fogline = ["No fog up here at all.", "Only a thin veil of fog.", "Fog in patches, coming and going.",
                       "Dense fog since first light.", "Heavy fog, I can barely see the lower nets."][d.fog]
            lines.append(f"{K} Cistern at {words(cist)} percent. {fogline}")
            if d.fog >= 3 and cist > 70:
                lines.append(f"{D} Understood. You will be full by noon at that rate; open the overflow if you pass ninety.")
            elif cist < 35:
                lines.append(f"{D} Understood, that is low. I will hold the carts off {st.name} for now.")
            else:
                lines.append(f"{D} {rng.choice(['Understood, thank you.', 'Copy that.', 'Noted, thanks.'])}")
        elif topic == "cart":
            drv = rng.choice(w.drivers)
            load = rng.choice([400, 600, 800, 1000, 1200])
            tt = clock((t + rng.randint(30, 180)) // 15 * 15)
            lines.append(f"{D} Can you spare {'a thousand' if load == 1000 else words(load // 100) + ' hundred'} litres? {drv.first} can be up with cart {rng.choice(w.carts)} by {tt}.")
            if cist > 40:
                lines.append(f"{K} {rng.choice(['Yes, that is fine.', 'We can spare that.', 'No problem, send the cart up.'])} Tell {drv.first} the lower gate is stiff.")
                lines.append(f"{D} Will do. Cart at {tt}, {load} litres.")
            else:
                lines.append(f"{K} Not today, I am only at {words(cist)} percent. Try {rng.choice([s.name for s in w.stations if s.ridge == st.ridge and s is not st])} instead.")
                lines.append(f"{D} Understood, I will ask them.")
        elif topic == "parts":
            part = rng.choice(["mesh panels", "clips", "pump seals", "guy line", "a float switch", "gutter brackets"])
            n = rng.randint(2, 12)
            lines.append(f"{K} I need {words(n)} {part} when someone comes up.")
            lines.append(f"{D} {rng.choice(['I will put it on the next cart.', 'Noted, I will raise a ticket.', 'We are short on those; it may take a few days.'])}")
        elif topic == "weather":
            lines.append(f"{D} {rng.choice(['What is the wind doing?', 'How is the wind up there?', 'Any change in the wind?'])}")
            lines.append(f"{K} From the {compass(d.direction)}, about {words(max(1, round(d.wind)))} metres a second. Air is {words(max(1, round(d.air)))} degrees.")
            lines.append(f"{D} {rng.choice(['The forecast says the fog will thicken tonight.', 'We expect it to clear after midday.', 'Same here in the valley.'])}")
        elif topic == "fault":
            fault = rng.choice(["pump two stalled again", "net three has a tear along the bottom", "the float switch is sticking",
                                "the inlet screen is clogged with salt", "a pole on the windward side is leaning"])
            lines.append(f"{K} One more thing, {fault}.")
            eng = rng.choice(w.engineers)
            lines.append(f"{D} Understood. I will send {eng.first} up {rng.choice(['tomorrow morning', 'this afternoon', 'when the track is open'])}. Can you manage until then?")
            lines.append(f"{K} {rng.choice(['Yes, I can manage.', 'I will keep an eye on it.', 'For a day or two, yes.'])}")
        else:
            lines.append(f"{D} {rng.choice(['How are you keeping up there?', 'Did you get the letters I sent up?', 'Are you still short of lamp oil?'])}")
            lines.append(f"{K} {rng.choice(['Well enough, thank you. It is cold at night.', 'Yes, thank you, they came with the cart.', 'Fine. The birds keep me company.'])}")
    lines.append(f"{D} {rng.choice(['Thank you, dispatch out.', 'That is all for now. Dispatch out.', 'Talk at the evening call. Out.'])}")
    lines.append(f"{K} {rng.choice([f'{st.name} out.', 'Out.', f'Understood. {st.name} out.'])}")
    return "\n".join(lines) + "\n"


# ---------------------------------------------------------------- register: tickets

FAULTS = [
    ("torn mesh panel", "Panel {net} torn along the lower edge, about {cm} cm.", "{n} × mesh panel 1.2 m; {c} × clip (µ-grade)"),
    ("pump stall", "Pump {p} stalls under load, code E{code}; restarts after a few minutes.", "1 × pump seal kit; 1 × bearing 12 mm"),
    ("float switch sticking", "Float switch in the cistern sticks above {pct}%; overflow late.", "1 × float switch"),
    ("clogged inlet screen", "Salt crust on the inlet screen, flow down to {flow} L/min.", "1 × inlet screen 40 µm"),
    ("leaning pole", "Windward pole {net} leans about {deg}° after the storm.", "{n} × guy line 8 m; 2 × ground anchor"),
    ("gutter leak", "Gutter under net {net} leaks at the joint, losing maybe {pct}% of the catch.", "{n} × gutter bracket; 1 × sealant tube"),
    ("high conductivity", "Conductivity at {cond} µS/cm for three days; suspect salt spray on the upper nets.", "none"),
]


def doc_ticket(rng: random.Random, w: World) -> str:
    blocks = []
    num = rng.randint(1000, 9000)
    d = draw_day(rng)
    for _ in range(rng.randint(2, 6)):
        st = rng.choice(w.stations)
        fault, detail, parts = rng.choice(FAULTS)
        slots = {"net": rng.randint(1, st.nets), "cm": rng.randint(5, 90), "p": rng.randint(1, 2),
                     "code": rng.choice([41, 42, 57]), "pct": rng.randint(5, 95), "flow": f"{rng.uniform(0.05, 0.4):.2f}",
                     "deg": rng.randint(4, 25), "cond": rng.randint(70, 160), "n": rng.randint(1, 6), "c": rng.randint(4, 30)}
        reporter = st.keeper.full if st.keeper else rng.choice(w.keepers).full
        prio = rng.choice(["low", "medium", "medium", "high"])
        status = rng.choice(["open", "open", "assigned", "waiting for parts", "closed"])
        b = [f"TICKET #{num}",
             f"opened: cycle {d.cycle} day {d.day} {clock(rng.randint(6 * 60, 20 * 60))}",
             f"station: {st.code} {st.name} (ridge {st.ridge})",
             f"reported by: {reporter}",
             f"fault: {fault}",
             f"detail: {detail.format(**slots)}",
             f"parts: {parts.format(**slots)}",
             f"priority: {prio}",
             f"assigned: {rng.choice(w.engineers).full if status != 'open' else '–'}",
             f"status: {status}"]
        blocks.append("\n".join(b))
        num += rng.randint(1, 9)
        d = Day(d.cycle, min(360, d.day + rng.randint(0, 2)), d.fog, d.wind, d.direction, d.air, d.cist, d.cond)
    return "\n----\n".join(blocks) + "\n"


# ---------------------------------------------------------------- main

# (generator, relative document weight); the weights aim at byte shares of roughly
# log 30 %, table 18 %, notes 20 %, radio 20 %, ticket 12 %.
REGISTERS = {"log": (doc_log, 1.0), "table": (doc_table, 1.0), "notes": (doc_notes, 2.9),
             "radio": (doc_radio, 2.6), "ticket": (doc_ticket, 1.0)}


def generate(seed: int, target_bytes: int, heldout_share: float) -> tuple[list[str], list[str], dict]:
    rng = random.Random(seed)
    world = build_world(rng)
    names = list(REGISTERS)
    weights = [REGISTERS[n][1] for n in names]
    train: list[str] = []
    held: list[str] = []
    stats: dict = {"seed": seed, "registers": {n: {"docs": 0, "bytes": 0} for n in names}}
    total = 0
    while total < target_bytes:
        reg = rng.choices(names, weights=weights)[0]
        text = DOC_MARK + REGISTERS[reg][0](rng, world)
        nbytes = len(text.encode("utf-8"))
        (held if rng.random() < heldout_share else train).append(text)
        stats["registers"][reg]["docs"] += 1
        stats["registers"][reg]["bytes"] += nbytes
        total += nbytes
    stats["world"] = {"ridges": world.ridges, "stations": len(world.stations), "valley": world.valley,
                      "people": len(world.keepers) + len(world.dispatchers) + len(world.drivers) + len(world.engineers)}
    return train, held, stats


def write_atomic(path: Path, data: bytes) -> None:
    tmp = path.with_name(path.name + ".tmp")
    with open(tmp, "wb") as f:
        f.write(data)
    os.replace(tmp, path)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--seed", type=int, default=1234)
    ap.add_argument("--out", default="data/corpus")
    ap.add_argument("--mb", type=float, default=4.0, help="target corpus size in MB (10^6 bytes)")
    ap.add_argument("--heldout", type=float, default=0.05, help="share of documents held out")
    args = ap.parse_args()
    t0 = time.monotonic()
    train, held, stats = generate(args.seed, int(args.mb * 1e6), args.heldout)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    tb, hb = "".join(train).encode("utf-8"), "".join(held).encode("utf-8")
    write_atomic(out / "train.txt", tb)
    write_atomic(out / "heldout.txt", hb)
    stats.update(train_docs=len(train), train_bytes=len(tb), heldout_docs=len(held), heldout_bytes=len(hb))
    write_atomic(out / "stats.json", (json.dumps(stats, indent=2, ensure_ascii=False) + "\n").encode("utf-8"))
    print(f"corpus: {len(train)} train docs ({len(tb) / 1e6:.2f} MB), {len(held)} held-out docs "
          f"({len(hb) / 1e6:.2f} MB) -> {out}  [{time.monotonic() - t0:.1f} s]")


if __name__ == "__main__":
    main()
