"""Generate the Larkmoor Valley Railway announcement data (training set + dev set).

Written service notices ("The 17:42 to Marrowby departs from platform 4.") are
turned into the spoken form read by the station announcement voice
("the seventeen forty-two to marrowby departs from platform four").

References are produced by rules.  The *current house style* is the only
style used for dev references.  The training targets come from an archive
that also holds notices read by two older voice systems; those only differ
from the house style on early-morning times (hours 05-09):

    08:40   house        oh eight forty
            old, digits  zero eight four zero          (+ optional "hours")
            old, words   zero eight forty              (+ optional "hours")

so a notice with an early time has five renderings in training (house
weight HOUSE_WEIGHT, each older rendering weight 1), while every other
notice has exactly one.  Proportions are printed and documented in README.md.

Usage:  python sample_data/make_data.py [--out sample_data/build]
Writes  train.tsv (source, target) and dev_refs.tsv (id, source, reference).
"""

import argparse
import random
from pathlib import Path

SEED = 20240611
N_TRAIN = 60000
DEV_PER_BUCKET = 80  # 5 reference-length buckets -> 400 dev rows
MAX_WORDS = 60  # longest reference (house style), in words
BUCKETS = [(1, 10), (11, 20), (21, 30), (31, 40), (41, 10_000)]

# style weights for notices that contain an early-morning time
HOUSE_WEIGHT = 1.4
OLD_STYLES = ["digits", "digits_hours", "words", "words_hours"]  # weight 1 each
EARLY_TIME_PROB = 0.2  # chance that any one time in a notice is 05:00-09:59

OPERATOR = "Larkmoor Valley Railway"
TOWNS = [
    "Marrowby", "Quillhaven", "Brindlemoor", "Sallowmere", "Tarnwick",
    "Elderholt", "Vossmoor", "Kestrelford", "Fennick Cross", "Oakhythe",
    "Harlowen", "Winsmere Halt", "Copperdene", "Ravelstoke", "Thistlecombe",
    "Lowen Quay", "Gorsebridge", "Millhallow",
]

ONES = ["zero", "one", "two", "three", "four", "five", "six", "seven", "eight",
        "nine", "ten", "eleven", "twelve", "thirteen", "fourteen", "fifteen",
        "sixteen", "seventeen", "eighteen", "nineteen"]
TENS = ["", "", "twenty", "thirty", "forty", "fifty", "sixty", "seventy",
        "eighty", "ninety"]


def words(n: int) -> str:
    """0..99 in words, compound numbers hyphenated (forty-two)."""
    if n < 20:
        return ONES[n]
    t, u = divmod(n, 10)
    return TENS[t] if u == 0 else f"{TENS[t]}-{ONES[u]}"


def minutes_words(m: int) -> str:
    if m == 0:
        return "hundred"
    if m < 10:
        return f"oh {ONES[m]}"
    return words(m)


def say_time(h: int, m: int, style: str) -> str:
    if h >= 10:
        return f"{words(h)} {minutes_words(m)}"
    if style == "house":
        return f"oh {ONES[h]} {minutes_words(m)}"
    if style.startswith("digits"):
        mm = f"{ONES[m // 10]} {ONES[m % 10]}"
    else:
        mm = minutes_words(m)
    out = f"zero {ONES[h]} {mm}"
    if style.endswith("_hours"):
        out += " hours"
    return out


def say_fare(pence: int) -> str:
    pounds, p = divmod(pence, 100)
    if pounds == 0:
        return f"{words(p)} pence"
    unit = "pound" if pounds == 1 else "pounds"
    return f"{words(pounds)} {unit}" + (f" {words(p)}" if p else "")


def spoken_town(t: str) -> str:
    return t.lower()


class Notice:
    """Builds a written notice and its spoken form side by side."""

    def __init__(self, rng: random.Random):
        self.rng = rng
        self.times = []  # (h, m) in order of appearance
        self.src = []
        self.tgt = []  # list of str or ("TIME", idx)

    def time(self):
        rng = self.rng
        if rng.random() < EARLY_TIME_PROB:
            h = rng.randint(5, 9)
        else:
            h = rng.randint(10, 23)
        m = rng.choice([0, 0, 5, 15, 30, 45]) if rng.random() < 0.25 else rng.randint(0, 59)
        self.times.append((h, m))
        return f"{h:02d}:{m:02d}", ("TIME", len(self.times) - 1)

    def render(self, style: str) -> str:
        out = []
        for piece in self.tgt:
            if isinstance(piece, tuple):
                h, m = self.times[piece[1]]
                out.append(say_time(h, m, style))
            else:
                out.append(piece)
        return " ".join(" ".join(out).split())

    @property
    def has_early(self) -> bool:
        return any(h < 10 for h, _ in self.times)


def town_list(rng, k, exclude=()):
    pool = [t for t in TOWNS if t not in exclude]
    return rng.sample(pool, k)


def join_written(items):
    if len(items) == 1:
        return items[0]
    return ", ".join(items[:-1]) + " and " + items[-1]


def join_spoken(items):
    if len(items) == 1:
        return items[0]
    return " ".join(items[:-1]) + " and " + items[-1]


def add_main(n: Notice):
    rng = n.rng
    dest = rng.choice(TOWNS)
    used = {dest}
    ts, tt = n.time()
    kind = rng.random()
    if kind < 0.4:
        n.src.append(f"The {ts} to {dest}")
        n.tgt += ["the", tt, "to", spoken_town(dest)]
    elif kind < 0.7:
        n.src.append(f"The {ts} {OPERATOR} service to {dest}")
        n.tgt += ["the", tt, OPERATOR.lower(), "service to", spoken_town(dest)]
    else:
        origin = rng.choice([t for t in TOWNS if t != dest])
        used.add(origin)
        n.src.append(f"The {ts} service from {origin} to {dest}")
        n.tgt += ["the", tt, "service from", spoken_town(origin), "to", spoken_town(dest)]
    calling = rng.random() < 0.55
    if calling:
        stops = town_list(rng, rng.randint(1, 5), exclude=used)
        n.src[-1] += ", calling at " + join_written(stops) + ","
        n.tgt += ["calling at", join_spoken([spoken_town(s) for s in stops])]

    if rng.random() < 0.12:
        n.src[-1] += " is cancelled."
        n.tgt += ["is cancelled"]
        return dest
    preds_w, preds_s = [], []
    options = ["platform", "delay", "now_platform", "arrive", "coaches", "late"]
    chosen = rng.sample(options, rng.randint(1, 3))
    if "platform" in chosen and "now_platform" in chosen:
        chosen.remove("platform")
    if "delay" in chosen and "late" in chosen:
        chosen.remove("late")
    for c in chosen:
        if c == "platform":
            p = rng.randint(1, 12)
            preds_w.append(f"departs from platform {p}")
            preds_s.append([f"departs from platform {words(p)}"])
        elif c == "now_platform":
            p = rng.randint(1, 12)
            preds_w.append(f"will now depart from platform {p}")
            preds_s.append([f"will now depart from platform {words(p)}"])
        elif c == "delay":
            m = rng.randint(2, 59)
            preds_w.append(f"is delayed by approximately {m} minutes")
            preds_s.append([f"is delayed by approximately {words(m)} minutes"])
        elif c == "late":
            m = rng.randint(2, 59)
            preds_w.append(f"is running {m} minutes late")
            preds_s.append([f"is running {words(m)} minutes late"])
        elif c == "coaches":
            k = rng.randint(2, 12)
            preds_w.append(f"is formed of {k} coaches")
            preds_s.append([f"is formed of {words(k)} coaches"])
        elif c == "arrive":
            ts2, tt2 = n.time()
            preds_w.append(f"is expected to arrive at {ts2}")
            preds_s.append(["is expected to arrive at", tt2])
    n.src[-1] += " " + join_written(preds_w) + "."
    for i, ps in enumerate(preds_s):
        if i > 0 and i == len(preds_s) - 1:
            n.tgt.append("and")
        n.tgt += ps
    return dest


REASONS_W = [
    ("a signalling fault near {a}", "a signalling fault near {a}"),
    ("a shortage of train crew", "a shortage of train crew"),
    ("flooding between {a} and {b}", "flooding between {a} and {b}"),
    ("a broken-down train at {a}", "a broken-down train at {a}"),
    ("a points failure at {a}", "a points failure at {a}"),
    ("a fault with the overhead wires", "a fault with the overhead wires"),
]


def add_extra(n: Notice, dest: str, kind: str):
    rng = n.rng
    a, b = town_list(rng, 2)
    if kind == "reason":
        w, s = rng.choice(REASONS_W)
        n.src.append("This is due to " + w.format(a=a, b=b) + ".")
        n.tgt += ["this is due to", s.format(a=spoken_town(a), b=spoken_town(b))]
    elif kind == "bus":
        ts, tt = n.time()
        n.src.append(f"A replacement bus will depart from the station forecourt at {ts}.")
        n.tgt += ["a replacement bus will depart from the station forecourt at", tt]
    elif kind == "change":
        n.src.append(f"Passengers for {a} should change at {b}.")
        n.tgt += ["passengers for", spoken_town(a), "should change at", spoken_town(b)]
    elif kind == "next":
        ts, tt = n.time()
        p = rng.randint(1, 12)
        n.src.append(f"The next service to {dest} departs at {ts} from platform {p}.")
        n.tgt += ["the next service to", spoken_town(dest), "departs at", tt,
                  "from platform", words(p)]
    elif kind in ("fare", "return"):
        pence = rng.choice([rng.randint(2, 19) * 5, rng.randint(100, 4999)])
        pence = pence - pence % 5
        fw = f"£{pence // 100}.{pence % 100:02d}" if pence >= 100 else f"{pence}p"
        if kind == "fare":
            n.src.append(f"Single fares to {a} are {fw}.")
            n.tgt += ["single fares to", spoken_town(a), "are", say_fare(pence)]
        else:
            n.src.append(f"An off-peak return to {a} costs {fw}.")
            n.tgt += ["an off-peak return to", spoken_town(a), "costs", say_fare(pence)]
    elif kind == "apology":
        n.src.append("We apologise for the disruption to your journey.")
        n.tgt += ["we apologise for the disruption to your journey"]
    else:
        n.src.append("Please listen for further announcements.")
        n.tgt += ["please listen for further announcements"]


def add_short(n: Notice):
    rng = n.rng
    k = rng.random()
    if k < 0.3:
        p = rng.randint(1, 12)
        n.src.append(f"Platform {p} is now closed.")
        n.tgt += [f"platform {words(p)} is now closed"]
    elif k < 0.65:
        ts, tt = n.time()
        dest = rng.choice(TOWNS)
        n.src.append(f"The {ts} to {dest} is cancelled.")
        n.tgt += ["the", tt, "to", spoken_town(dest), "is cancelled"]
    else:
        ts, tt = n.time()
        m = rng.randint(2, 59)
        n.src.append(f"The {ts} is delayed by {m} minutes.")
        n.tgt += ["the", tt, f"is delayed by {words(m)} minutes"]


def make_notice(rng: random.Random) -> Notice:
    n = Notice(rng)
    if rng.random() < 0.15:
        add_short(n)
        return n
    dest = add_main(n)
    kinds = ["reason", "bus", "change", "next", "fare", "return", "apology", "listen"]
    for kind in rng.sample(kinds, rng.choice([0, 0, 1, 1, 2, 2, 3, 4])):
        add_extra(n, dest, kind)
    return n


def pick_style(rng, n: Notice) -> str:
    if not n.has_early:
        return "house"
    styles = ["house"] + OLD_STYLES
    weights = [HOUSE_WEIGHT] + [1.0] * len(OLD_STYLES)
    return rng.choices(styles, weights)[0]


def bucket_of(n_words: int) -> int:
    for i, (lo, hi) in enumerate(BUCKETS):
        if lo <= n_words <= hi:
            return i
    raise ValueError(n_words)


def clean(s: str) -> str:
    s = " ".join(s.split())
    assert "\t" not in s and "\n" not in s
    return s


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--out", default=str(Path(__file__).parent / "build"))
    args = ap.parse_args()
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    rng = random.Random(SEED)

    # dev set first: balanced over reference-length buckets, house style only
    dev, seen = [], set()
    need = [DEV_PER_BUCKET] * len(BUCKETS)
    while sum(need) > 0:
        n = make_notice(rng)
        src = clean(" ".join(n.src))
        ref = clean(n.render("house"))
        if len(ref.split()) > MAX_WORDS:
            continue
        b = bucket_of(len(ref.split()))
        if need[b] > 0 and src not in seen:
            need[b] -= 1
            seen.add(src)
            dev.append((src, ref, n.has_early))
    rng.shuffle(dev)

    # training set: natural mix, long notices up-weighted a little by rejection
    train, n_early, style_counts = [], 0, {}
    while len(train) < N_TRAIN:
        n = make_notice(rng)
        src = clean(" ".join(n.src))
        if src in seen:
            continue
        style = pick_style(rng, n)
        tgt = clean(n.render(style))
        if len(clean(n.render("house")).split()) > MAX_WORDS:
            continue
        train.append((src, tgt))
        if n.has_early:
            n_early += 1
            style_counts[style] = style_counts.get(style, 0) + 1

    with open(out / "train.tsv", "w", encoding="utf-8") as f:
        f.write("source\ttarget\n")
        for s, t in train:
            f.write(f"{s}\t{t}\n")
    with open(out / "dev_refs.tsv", "w", encoding="utf-8") as f:
        f.write("id\tsource\treference\n")
        for i, (s, r, _) in enumerate(dev):
            f.write(f"lvr-{i + 1:04d}\t{s}\t{r}\n")

    lens = [len(t.split()) for _, t in train]
    print(f"train: {len(train)} notices, target words min {min(lens)} max {max(lens)} "
          f"mean {sum(lens) / len(lens):.1f}")
    print(f"train notices with an early time: {n_early} ({n_early / len(train):.1%})")
    for k in ["house"] + OLD_STYLES:
        c = style_counts.get(k, 0)
        print(f"  style {k:13s} {c:6d} ({c / max(n_early, 1):.1%} of early-time notices)")
    dev_early = sum(e for *_, e in dev)
    dlens = [len(r.split()) for _, r, _ in dev]
    print(f"dev: {len(dev)} notices, reference words min {min(dlens)} max {max(dlens)}; "
          f"with an early time: {dev_early} ({dev_early / len(dev):.1%})")


if __name__ == "__main__":
    main()
