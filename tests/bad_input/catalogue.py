"""What every key and flag accepts, as README states it, and the bad values generated from that.

The contract lives here, written out independently of the code under test: each space-file key,
budget and train key and CLI flag has a *rule* (what README's key table and option help promise)
and the suite feeds it one value of each wrong kind. A generic value that happens to be valid
for a key (zero for `head.hidden`, an empty `description`) is left out by asking the rule.
"""

from __future__ import annotations

import functools
import math
import re
import tomllib
from dataclasses import dataclass
from typing import Any, Callable

# -- limits stated in README's key table -----------------------------------------------------
MAX_SIDE = 1024  # input height or width, pixels; also the ceiling on strides and pool windows
MAX_WIDTH = 4096  # channels of any conv or hidden dense layer
MAX_KERNEL = 31
MAX_STAGES = 10
MAX_CONVS = 10  # convs per stage
MAX_CLASSES = 100_000
MAX_CHOICES = 64  # entries in any list of choices
MAX_CAP = 10**15  # any budget cap, counts or bytes
MAX_SEED = 2**31 - 1
MAX_SAMPLES = 1_000_000  # census draws
MAX_TRIALS = 1_000_000
MAX_WORKERS = 64
MAX_MINUTES = 10_080  # one week
MAX_EPOCHS = 1000
MAX_BATCH = 65_536
MAX_TRIAL_NUMBER = 2**31 - 1
MAX_CONFIRM_SEEDS = 20  # --confirm
MAX_CONFIRM_CANDIDATES = 100  # --confirm-candidates, --confirm-random

LONG = 100_000  # characters of a "very long" value
LONG_LIST = 2_000  # entries of a very long list (far past MAX_CHOICES; tomllib reads it in milliseconds)
BEYOND_64_BITS = 2**64 + 1


# -- rules ------------------------------------------------------------------------------------
def _int(v: Any) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


@dataclass(frozen=True)
class Rule:
    """A key's promise: ``accepts`` answers for one parsed value; ``kind`` picks the value catalogue."""

    kind: str  # int, ints, range, number, numbers, words, one_word, bools, one_bool, text, size, sizes, count, bytes
    accepts: Callable[[Any], bool]


def int_rule(lo: int, hi: int, among: tuple[int, ...] = ()) -> Rule:
    return Rule("int", lambda v: _int(v) and lo <= v <= hi and (not among or v in among))


def ints_rule(lo: int, hi: int, odd: bool = False) -> Rule:
    def one(v: Any) -> bool:
        return _int(v) and lo <= v <= hi and (not odd or v % 2 == 1)

    return Rule("ints", lambda v: one(v) or (isinstance(v, list) and 0 < len(v) <= MAX_CHOICES and all(map(one, v))))


def range_rule(lo: int, hi: int) -> Rule:
    def ok(v: Any) -> bool:
        if _int(v):
            return lo <= v <= hi
        return isinstance(v, list) and len(v) == 2 and all(map(_int, v)) and lo <= v[0] <= v[1] <= hi

    return Rule("range", ok)


def number_rule(test: Callable[[float], bool], many: bool = False) -> Rule:
    def one(v: Any) -> bool:
        return _number(v) and test(v)

    if many:
        return Rule("numbers", lambda v: one(v) or (isinstance(v, list) and 0 < len(v) <= MAX_CHOICES and all(map(one, v))))
    return Rule("number", one)


def words_rule(options: tuple[str, ...], many: bool = True) -> Rule:
    def ok(v: Any) -> bool:
        if isinstance(v, str):
            return v in options
        return many and isinstance(v, list) and 0 < len(v) <= MAX_CHOICES and all(x in options for x in v)

    return Rule("words" if many else "one_word", ok)


def bools_rule(many: bool = True) -> Rule:
    def ok(v: Any) -> bool:
        return isinstance(v, bool) or (many and isinstance(v, list) and 0 < len(v) <= 2 and all(isinstance(x, bool) for x in v))

    return Rule("bools" if many else "one_bool", ok)


def text_rule(shortest: int, longest: int, printable: bool) -> Rule:
    return Rule("text", lambda v: isinstance(v, str) and shortest <= len(v) <= longest and (not printable or v.isprintable()))


def _side(v: Any) -> bool:
    return _int(v) and 1 <= v <= MAX_SIDE


def _pair(v: Any) -> bool:
    return _side(v) or (isinstance(v, list) and len(v) == 2 and all(map(_side, v)))


SIZE = Rule("size", _pair)
SIZES = Rule("sizes", lambda v: isinstance(v, list) and 0 < len(v) <= MAX_CHOICES and all(map(_pair, v)))

# README: counts take k, M, G (x1000); bytes take kB/MB/GB (x1000) or KiB/MiB/GiB (x1024); a bare number
_COUNT_UNITS = {"": 1, "k": 10**3, "K": 10**3, "M": 10**6, "G": 10**9}
_BYTE_UNITS = {"": 1, "B": 1, "kB": 10**3, "KB": 10**3, "MB": 10**6, "GB": 10**9, "KiB": 2**10, "MiB": 2**20, "GiB": 2**30}
_AMOUNT = re.compile(r"^\s*([0-9][0-9_]*(?:\.[0-9]+)?)\s*([A-Za-z]*)\s*$")


def _amount(units: dict[str, int]) -> Callable[[Any], bool]:
    def ok(v: Any) -> bool:
        if _int(v) or _number(v):  # a plain number is rounded, like "2.5k"
            return 1 <= round(v) <= MAX_CAP
        if not isinstance(v, str) or len(v) > 40:
            return False
        found = _AMOUNT.match(v)
        if not found or found.group(2) not in units:
            return False
        value = round(float(found.group(1).replace("_", "")) * units[found.group(2)])
        return 1 <= value <= MAX_CAP

    return ok


COUNT = Rule("count", _amount(_COUNT_UNITS))
BYTES = Rule("bytes", _amount(_BYTE_UNITS))

# README: a time per inference takes us/µs, ms or s, above 0 and at most a day; a target's clock Hz, kHz, MHz or
# GHz from 1 kHz to 10 GHz; the cores QEMU emulates as whole boards
_TIME_UNITS = {"us": 1e-3, "µs": 1e-3, "ms": 1.0, "s": 1e3}
_CLOCK_UNITS = {"hz": 1.0, "khz": 1e3, "mhz": 1e6, "ghz": 1e9}
CORES = ("cortex-m3", "cortex-m4", "cortex-m7", "cortex-m55")


def _quantity(units: dict[str, float], low: float, high: float, low_open: bool, case: bool) -> Callable[[Any], bool]:
    def ok(v: Any) -> bool:
        found = re.fullmatch(r"\s*([0-9][0-9_]*(?:\.[0-9]+)?)\s*([A-Za-zµ]+)\s*", v) if isinstance(v, str) else None
        unit = found and (found.group(2) if case else found.group(2).lower())
        if not found or unit not in units or len(v) > 40:
            return False
        value = float(found.group(1).replace("_", "")) * units[unit]
        return (low < value if low_open else low <= value) and value <= high

    return ok


TIME = Rule("time", _quantity(_TIME_UNITS, 0, 86_400_000, low_open=True, case=True))
CLOCK = Rule("clock", _quantity(_CLOCK_UNITS, 1e3, 1e10, low_open=False, case=False))


def _target(text: str) -> bool:
    core, _, clock = text.partition("@")
    return text.count("@") == 1 and core.strip().lower() in CORES and CLOCK.accepts(clock)

ACTIVATIONS = ("relu", "relu6", "tanh", "sigmoid", "hardswish")
PRECISIONS = ("fp32", "fp16", "int8")

# Every key of a space file (README "Search-space files" and the [train] settings) with its rule.
SPACE_KEYS: dict[str, Rule] = {
    "name": text_rule(1, 80, printable=True),
    "description": text_rule(0, 2000, printable=False),
    "input.channels": int_rule(1, 4, among=(1, 3, 4)),
    "input.size": SIZE,
    "input.sizes": SIZES,
    "input.classes": int_rule(2, MAX_CLASSES),
    "stages.count": range_rule(1, MAX_STAGES),
    "stages.convs": range_rule(1, MAX_CONVS),
    "stages.first_width": ints_rule(1, MAX_WIDTH),
    "stages.growth": number_rule(lambda v: 0 < v <= 16),
    "stages.max_width": int_rule(1, MAX_WIDTH),
    "stages.round_to": int_rule(1, MAX_WIDTH),
    "conv.kernel": ints_rule(1, MAX_KERNEL, odd=True),  # the base space pads 'same': odd kernels only
    "conv.padding": words_rule(("same", "valid"), many=False),
    "conv.stride": int_rule(1, MAX_SIDE),
    "conv.activation": words_rule(ACTIVATIONS),
    "conv.batch_norm": bools_rule(),
    "pool.kind": words_rule(("max", "avg", "none")),
    "pool.window": int_rule(1, MAX_SIDE),
    "pool.stride": int_rule(1, MAX_SIDE),
    "head.features": words_rule(("gap", "flatten")),
    "head.hidden": range_rule(0, 2),
    "head.hidden_width": ints_rule(1, MAX_WIDTH),
    "head.dropout": number_rule(lambda v: 0 <= v < 1, many=True),
    "budget.max_params": COUNT,
    "budget.max_macs": COUNT,
    "budget.max_activation": BYTES,
    "budget.max_weight": BYTES,
    "budget.weight_precision": words_rule(PRECISIONS, many=False),
    "budget.activation_precision": words_rule(PRECISIONS, many=False),
    "budget.max_latency": TIME,
    "target.core": words_rule(CORES, many=False),
    "target.clock": CLOCK,
    "train.epochs": int_rule(1, MAX_EPOCHS),
    "train.train_fraction": number_rule(lambda v: 0 < v <= 1),
    "train.batch_size": int_rule(2, MAX_BATCH),
    "train.optimizer": words_rule(("adamw", "sgd"), many=False),
    "train.learning_rate": number_rule(lambda v: v > 0),  # finite; a huge one diverges and fails the candidate
    "train.schedule": words_rule(("onecycle", "cosine", "constant"), many=False),
    "train.weight_decay": number_rule(lambda v: v >= 0),
    "train.label_smoothing": number_rule(lambda v: 0 <= v < 1),
    "train.channels_last": bools_rule(many=False),
    "train.eval_batch_size": int_rule(1, MAX_BATCH),
    # [train.augment], written here as dotted keys inside [train] (TOML: augment.shift = 4)
    "train.augment": Rule("table", lambda v: isinstance(v, dict) and not v),  # an empty table: all off
    "train.augment.shift": int_rule(0, 64),
    "train.augment.flip": bools_rule(many=False),
    "train.augment.rotate": number_rule(lambda v: 0 <= v <= 180),
    "train.augment.scale": number_rule(lambda v: 0 <= v <= 0.5),
    "train.augment.brightness": number_rule(lambda v: 0 <= v <= 0.5),
    "train.augment.contrast": number_rule(lambda v: 0 <= v <= 0.9),
}

# A small space that reads cleanly and censuses in milliseconds; each case changes one key.
BASE_SPACE: dict[str, dict[str, str] | str] = {
    "name": '"tiny"',
    "input": {"channels": "1", "sizes": "[[12, 12], [16, 16]]", "classes": "4"},
    "stages": {"count": "[1, 2]", "convs": "[1, 2]", "first_width": "[2, 4]", "growth": "2.0", "max_width": "8"},
    "conv": {"kernel": "3", "padding": '"same"', "activation": '["relu", "tanh"]', "batch_norm": "[true, false]"},
    "pool": {"kind": '["max", "none"]', "window": "2"},
    "head": {"features": '["gap", "flatten"]', "hidden": "[0, 1]", "hidden_width": "[3, 5]", "dropout": "0.0"},
    "budget": {"max_params": '"300"', "max_macs": '"20k"'},
    "train": {"epochs": "2"},
}


def space_text(key: str | None = None, literal: str | None = None) -> str:
    """The base space as TOML, with ``key`` set to the TOML ``literal`` (``input.size`` replaces ``sizes``)."""
    sections = {k: dict(v) if isinstance(v, dict) else v for k, v in BASE_SPACE.items()}
    if key is not None:
        section, _, name = key.partition(".")
        if not name:
            sections[section] = literal
        else:
            if key == "input.size":
                del sections["input"]["sizes"]
            sections.setdefault(section, {})[name] = literal
    top = [f"{k} = {v}" for k, v in sections.items() if not isinstance(v, dict)]
    tables = [f"[{k}]\n" + "\n".join(f"{n} = {x}" for n, x in v.items()) for k, v in sections.items() if isinstance(v, dict)]
    return "\n".join(top) + "\n\n" + "\n\n".join(tables) + "\n"


# -- the wrong kinds ------------------------------------------------------------------------------
# TOML literals of each wrong kind; the rule of the key decides which of them are wrong for it.
_WORD_WRONG = ['"ｒｅｌｕ"', '"😀"']
TOML_VALUES: list[tuple[str, str]] = [
    ("wrong type", '"abc"'), ("wrong type", "true"), ("wrong type", "{ a = 1 }"), ("wrong type", "2.5"),
    ("wrong type", "[[1, 2], [3]]"), ("wrong type", '"3"'),
    ("empty", '""'), ("empty", "[]"), ("empty", "{}"),
    ("zero", "0"), ("zero", "0.0"), ("zero", "[0, 0]"),
    ("negative", "-1"), ("negative", "-2.5"), ("negative", "[-1, 2]"),
    ("nan", "nan"), ("nan", "[nan]"), ("infinity", "inf"), ("infinity", "-inf"), ("infinity", "[1, inf]"),
    ("beyond 64 bits", str(BEYOND_64_BITS)), ("beyond 64 bits", f"[1, {BEYOND_64_BITS}]"),
    ("beyond 64 bits", f"[{BEYOND_64_BITS}, {BEYOND_64_BITS}]"), ("beyond 64 bits", f'"{BEYOND_64_BITS}"'),
    ("absurdly large", "1000000000000"), ("absurdly large", "1e300"), ("absurdly large", "[1, 1000000000]"),
    ("absurdly large", '"1000000000G"'), ("absurdly large", '"2000000GiB"'),
    ("wrong unit", '"32px"'), ("wrong unit", '"64KiB"'), ("wrong unit", '"20k"'), ("wrong unit", '"5 parsecs"'),
    ("unicode", '"３"'), *[("unicode", w) for w in _WORD_WRONG], ("unicode", '"tiny\\u0007"'),
    ("very long", '"' + "x" * LONG + '"'), ("very long", "[" + ", ".join(["3"] * LONG_LIST) + "]"),
]


@functools.cache
def toml_value(literal: str) -> Any:
    return tomllib.loads(f"v = {literal}")["v"]


def _just_beyond(rule: Rule) -> list[tuple[str, str]]:
    """One past the documented ceiling: the bounds themselves are part of the promise."""
    found = []
    for limit in (MAX_SIDE, MAX_WIDTH, MAX_KERNEL, MAX_STAGES, MAX_CONVS, MAX_CLASSES, MAX_EPOCHS, MAX_BATCH, 2, 4):
        for literal in (str(limit + 1), f"[1, {limit + 1}]", f"[{limit + 1}, {limit + 1}]"):
            found.append(("absurdly large", literal))
    found.append(("absurdly large", str(MAX_CAP + 1)))
    found.append(("absurdly large", "16.5"))  # growth
    found.append(("absurdly large", "1.5"))  # shares
    found.append(("very long", "[" + ", ".join(["3"] * (MAX_CHOICES + 1)) + "]"))
    found.append(("very long", '"' + "x" * 81 + '"'))  # name
    found.append(("very long", '"' + "x" * 2001 + '"'))  # description
    return found


def space_cases() -> list[tuple[str, str, str]]:
    """(key, kind, TOML literal) for every key and every wrong value of each kind."""
    cases = []
    for key, rule in SPACE_KEYS.items():
        seen: set[str] = set()
        for kind, literal in TOML_VALUES + _just_beyond(rule):
            if literal in seen or rule.accepts(toml_value(literal)):
                continue
            seen.add(literal)
            cases.append((key, kind, literal))
    return cases


# -- CLI flags --------------------------------------------------------------------------------
@dataclass(frozen=True)
class Flag:
    """A command-line option and what it accepts (``accepts`` reads the text as typed)."""

    name: str  # as typed, with dashes; "ARCH" for the positional of `cost`
    kind: str  # int, float, count, bytes, word, name, path, data, url, arch, switch
    accepts: Callable[[str], bool] = lambda text: False
    says: tuple[str, ...] = ()  # what the message must name; default the flag itself


def _parses(convert: Callable[[str], Any], test: Callable[[Any], bool]) -> Callable[[str], bool]:
    def ok(text: str) -> bool:
        try:
            return test(convert(text))
        except (ValueError, OverflowError):
            return False

    return ok


def int_flag(name: str, lo: int, hi: int) -> Flag:
    return Flag(name, "int", _parses(int, lambda v: lo <= v <= hi))


def float_flag(name: str, test: Callable[[float], bool]) -> Flag:
    return Flag(name, "float", _parses(float, lambda v: math.isfinite(v) and test(v)))


RUN_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,79}$")  # README: 1-80 letters, digits, '.', '_', '-'


def name_flag() -> Flag:
    return Flag("--name", "name", lambda t: bool(RUN_NAME.match(t)))


BUDGET_FLAGS = [
    Flag("--max-params", "count", COUNT.accepts), Flag("--max-macs", "count", COUNT.accepts),
    Flag("--max-activation", "bytes", BYTES.accepts), Flag("--max-weight", "bytes", BYTES.accepts),
    Flag("--weight-precision", "word", lambda t: t in PRECISIONS),
    Flag("--activation-precision", "word", lambda t: t in PRECISIONS),
    Flag("--max-latency", "time", TIME.accepts), Flag("--target", "target", _target),
]

COMMAND_FLAGS: dict[str, list[Flag]] = {
    "searcher": [Flag("--verbose", "switch")],  # the options before the command
    "cost": [Flag("ARCH", "arch", says=("architecture",)), Flag("--space", "path"), *BUDGET_FLAGS],
    "census": [
        Flag("--space", "path"), name_flag(), int_flag("--samples", 1, MAX_SAMPLES), int_flag("--seed", 0, MAX_SEED),
        int_flag("--classes", 2, MAX_CLASSES), Flag("--data", "data"), *BUDGET_FLAGS,
    ],
    "search": [
        Flag("--space", "path"), Flag("--data", "data"), name_flag(), int_flag("--trials", 1, MAX_TRIALS),
        float_flag("--minutes", lambda v: 0 < v <= MAX_MINUTES),
        Flag("--objective", "word", lambda t: t in ("accuracy", "params", "macs", "activation")),
        Flag("--metric", "word", lambda t: t in ("accuracy", "balanced_accuracy")),
        Flag("--sampler", "word", lambda t: t in ("tpe", "nsga2", "random")), Flag("--storage", "url"),
        int_flag("--workers", 1, MAX_WORKERS), int_flag("--seed", 0, MAX_SEED), int_flag("--epochs", 1, MAX_EPOCHS),
        float_flag("--train-fraction", lambda v: 0 < v <= 1), int_flag("--batch-size", 2, MAX_BATCH),
        float_flag("--candidate-minutes", lambda v: 0 < v <= MAX_MINUTES),
        Flag("--max-train-memory", "bytes", BYTES.accepts), Flag("--skip-unreadable", "switch"), *BUDGET_FLAGS,
        int_flag("--confirm", 0, MAX_CONFIRM_SEEDS), int_flag("--confirm-candidates", 1, MAX_CONFIRM_CANDIDATES),
        int_flag("--confirm-random", 0, MAX_CONFIRM_CANDIDATES), Flag("--force", "switch"),
    ],
    "report": [name_flag(), Flag("--storage", "url")],
    "status": [name_flag(), Flag("--storage", "url")],
    "export": [
        name_flag(), int_flag("--trial", 0, MAX_TRIAL_NUMBER), Flag("--arch", "arch"),
        int_flag("--epochs", 1, MAX_EPOCHS), Flag("--storage", "url"),
        float_flag("--tolerance", lambda v: 0 <= v < 1), Flag("--force", "switch"), Flag("--target", "target", _target),
    ],
}

LENET5 = "1x32x32_c6k5v-a2_c16k5v-a2_flat-d120-d84-o10_tanh"
ARCH_OK = "1x16x16_c4k3-m2_gap-o4_relu"

# The generic wrong kinds as typed on a command line.
ARGV_VALUES: list[tuple[str, str]] = [
    ("wrong type", "abc"), ("wrong type", "[1, 2]"), ("wrong type", "{}"), ("wrong type", "2.5"), ("wrong type", "true"),
    ("empty", ""), ("empty", " "),
    ("zero", "0"), ("zero", "0.0"),
    ("negative", "-1"), ("negative", "-2.5"),
    ("nan", "nan"), ("infinity", "inf"), ("infinity", "-inf"),
    ("beyond 64 bits", str(BEYOND_64_BITS)), ("beyond 64 bits", "-" + str(BEYOND_64_BITS)),
    ("absurdly large", "1000000000000"), ("absurdly large", "1e300"), ("absurdly large", "10000000000"),
    ("absurdly large", "1000000000G"),
    ("wrong unit", "32px"), ("wrong unit", "64KiB"), ("wrong unit", "20k"), ("wrong unit", "5 parsecs"),
    ("unicode", "３"), ("unicode", "ｒｅｌｕ"), ("unicode", "😀"), ("unicode", "naïve"),
    ("very long", "x" * LONG), ("very long", "9" * LONG),
]

# Kinds whose bad values are not generic: paths, URLs, architecture texts.
SPECIAL_VALUES: dict[str, list[tuple[str, str]]] = {
    "path": [("missing", "missing.toml"), ("missing", "no-such-space"), ("wrong type", "."), ("wrong type", "folder"),
             ("wrong type", "binary.toml"), ("unicode", "ｍｃｕ"), ("empty", "")],
    "data": [("missing", "missing.npz"), ("missing", "no/such/folder"), ("unicode", "ｄｅｍｏ"), ("empty", "")],
    "url": [("wrong type", "mysql://u@h/db"), ("wrong type", "runs/x.txt"), ("wrong type", "sqlite://relative.db"),
            ("unicode", "ｓｑｌｉｔｅ:///x.db")],
    "arch": [("wrong type", "1x32x32"), ("wrong type", "{\"stages\": 1}"), ("wrong type", "[]"),
             ("zero", "0x16x16_c4k3-m2_gap-o4_relu"), ("zero", "1x16x16_c0k3-m2_gap-o4_relu"),
             ("zero", "1x16x16_c4k3-m2_gap-o0_relu"),
             ("beyond 64 bits", f"1x{BEYOND_64_BITS}x16_c4k3-m2_gap-o4_relu"),
             ("beyond 64 bits", f"1x16x16_c{BEYOND_64_BITS}k3-m2_gap-o4_relu"),
             ("beyond 64 bits", f"1x16x16_c4k3-m2_gap-o{BEYOND_64_BITS}_relu"),
             ("absurdly large", f"1x{MAX_SIDE + 1}x16_c4k3-m2_gap-o4_relu"),
             ("absurdly large", f"1x16x16_c{MAX_WIDTH + 1}k3-m2_gap-o4_relu"),
             ("absurdly large", f"1x16x16_c4k{MAX_KERNEL + 2}-m2_gap-o4_relu"),
             ("absurdly large", f"1x16x16_c4k3-m2_gap-d{MAX_WIDTH + 1}-o4_relu"),
             ("absurdly large", f"1x16x16_c4k3-m2_gap-o{MAX_CLASSES + 1}_relu"),
             ("absurdly large", "1x16x16_" + "_".join(["c4k3"] * (MAX_STAGES + 1)) + "_gap-o4_relu"),
             ("absurdly large", "1x16x16_" + "-".join(["c4k3"] * (MAX_CONVS + 1)) + "_gap-o4_relu"),
             ("nan", "1x16x16_c4k3-m2_gap-rnan-o4_relu"), ("infinity", "1x16x16_c4k3-m2_gap-rinf-o4_relu"),
             ("negative", "1x16x16_c4k3-m2_gap-r-0.5-o4_relu"),
             ("wrong unit", "1x16pxx16_c4k3-m2_gap-o4_relu"), ("unicode", "1x16x16_c４k3-m2_gap-o4_relu")],
}

SPECIAL_VALUES["time"] = [("zero", "0ms"), ("negative", "-5ms"), ("absurdly large", "86401s"),
                          ("wrong unit", "20 parsecs"), ("wrong unit", "20min")]
SPECIAL_VALUES["target"] = [("wrong type", "cortex-m4"), ("wrong type", "cortex-m0@48MHz"), ("zero", "cortex-m4@0Hz"),
                            ("wrong unit", "cortex-m4@80"), ("empty", "@80MHz"), ("absurdly large", "cortex-m4@20GHz"),
                            ("wrong type", "cortex-m4@80MHz@1GHz")]

# positional/JSON forms only the `cost` command reads
COST_FILES = [("missing", "missing.json"), ("wrong type", "folder.json"), ("wrong type", "binary.json"),
              ("wrong type", "wrong_fields.json"), ("beyond 64 bits", "huge.json"), ("empty", "empty.json")]


def flag_cases() -> list[tuple[str, Flag, str, str]]:
    """(command, flag, kind, value) for every flag of every command and every wrong value for it."""
    cases = []
    for command, flags in COMMAND_FLAGS.items():
        for flag in flags:
            if flag.kind == "switch":
                cases.append((command, flag, "wrong type", "yes"))
                continue
            values = list(SPECIAL_VALUES.get(flag.kind, []))
            if flag.kind in ("int", "float", "count", "bytes", "word", "name", "time", "target"):
                values += ARGV_VALUES
                values += [("absurdly large", v) for v in _just_beyond_argv(flag)]
            else:
                values += [(k, v) for k, v in ARGV_VALUES if k in ("very long", "empty", "unicode", "wrong type")]
            if command == "cost" and flag.name == "ARCH":
                values += COST_FILES
            seen: set[str] = set()
            for kind, value in values:
                if value in seen or flag.accepts(value):
                    continue
                seen.add(value)
                cases.append((command, flag, kind, value))
    return cases


def _just_beyond_argv(flag: Flag) -> list[str]:
    limits = (MAX_SAMPLES, MAX_SEED, MAX_CLASSES, MAX_TRIALS, MAX_WORKERS, MAX_MINUTES, MAX_EPOCHS, MAX_BATCH,
              MAX_CAP, MAX_TRIAL_NUMBER, MAX_CONFIRM_SEEDS, MAX_CONFIRM_CANDIDATES)
    return [str(v + 1) for v in limits] + ["x" * 81]
