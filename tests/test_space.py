"""Space files: what the reader refuses (naming file and key), and how spaces are drawn from."""

from __future__ import annotations

import os
import random
from pathlib import Path
from collections import Counter

import optuna
import pytest

from searcher.core.arch import Arch
from searcher.errors import SearcherError
from searcher.core.space import Space
from searcher.core.space_file import builtin_space, load_space

from conftest import SHIPPED_SPACES, TINY_SPACE


def variant(*changes: tuple[str, str]) -> str:
    """The tiny space with some lines replaced (each old line must be there)."""
    text = TINY_SPACE
    for old, new in changes:
        assert old in text, old
        text = text.replace(old, new)
    return text


# A much smaller space for uniformity and enumeration checks: 2 + 4 stage configurations, 3 heads.
SMALL = variant(('sizes = [[12, 12], [16, 16]]', 'sizes = [[12, 12]]'), ('count = [1, 3]', 'count = [1, 2]'),
                ('first_width = [2, 4]', 'first_width = [2]'), ('activation = ["relu", "tanh"]', 'activation = "relu"'),
                ('batch_norm = [true, false]', 'batch_norm = false'), ('kind = ["max", "none"]', 'kind = "max"'),
                ('features = ["gap", "flatten"]', 'features = "gap"'))


@pytest.mark.parametrize(
    ("changes", "key", "says"),
    [
        ([("kernel = 3", "kernal = 3")], "conv.kernal", "is not a known key.*did you mean 'kernel'"),
        ([("[head]", "[haed]")], "haed", "not a known section.*did you mean 'head'"),
        ([("count = [1, 3]", 'count = "three"')], "stages.count", "must be a whole number or a range"),
        ([("growth = 2.0", 'growth = "double"')], "stages.growth", r"must be a number in \(0, 16\]"),
        ([("first_width = [2, 4]", "first_width = []")], "stages.first_width", "at least one choice"),
        ([('kind = ["max", "none"]', "kind = []")], "pool.kind", "at least one choice"),
        ([("count = [1, 3]", "count = [3, 1]")], "stages.count", r"min ≤ max, got \[3, 1\]"),
        ([("convs = [1, 2]", "convs = [2, 1]")], "stages.convs", "min ≤ max"),
        ([("channels = 1", "channels = 0")], "input.channels", r"must be 1 \(gray\), 3 \(RGB\) or 4 \(RGBA\), got 0"),
        ([("sizes = [[12, 12], [16, 16]]", "sizes = [[12, 0]]")], "input.sizes", "whole numbers from 1 to 1,024"),
        ([("first_width = [2, 4]", "first_width = [2, -4]")], "stages.first_width", r"a whole number from 1 to 4,096 or a list of such choices, got -4 in \[2, -4\]"),
        ([("count = [1, 3]", "count = [0, 3]")], "stages.count", r"must stay within 1 to 10, got \[0, 3\]"),
        ([("kernel = 3", "kernel = [3, 4]")], "conv.kernel", "'same' needs odd kernels"),
        ([('max_params = "300"', 'max_params = "300 apples"')], "budget.max_params", "a count such as"),
        ([('max_macs = "20k"', 'max_macs = "20KiB"')], "budget.max_macs", "a count such as"),
        ([('activation = ["relu", "tanh"]', 'activation = ["relu", "tanhh"]')], "conv.activation",
         "'tanhh'.*did you mean 'tanh'"),
        ([('padding = "same"', 'padding = "vaild"')], "conv.padding", "did you mean 'valid'"),
        ([("hidden = [0, 1]", "hidden = [0, 3]")], "head.hidden", r"within 0 to 2, got \[0, 3\]"),
        ([("dropout = 0.0", "dropout = [0.5, 1.0]")], "head.dropout", r"in \[0, 1\)"),
        ([("batch_norm = [true, false]", 'batch_norm = "yes"')], "conv.batch_norm", "true or false"),
    ],
)
def test_bad_space_files_name_file_and_key(write_space, changes, key, says):
    path = write_space(variant(*changes))
    with pytest.raises(SearcherError, match=says) as info:
        load_space(path)
    assert info.value.key == key
    assert info.value.file == str(path) and str(path) in str(info.value)
    assert f"`{key}`" in str(info.value)


def test_choices_that_shrink_the_map_below_one_pixel_name_the_stage(write_space):
    # 12x12 input, up to two valid 5x5 convs and 2x2 pooling per stage: stage 1 ends at 2x2,
    # stage 2's first conv cannot fit.
    path = write_space(variant(('padding = "same"', 'padding = "valid"'), ("kernel = 3", "kernel = [3, 5]")))
    with pytest.raises(SearcherError, match="stage 2 with 2 valid 5x5 conv.*shrinks a 2x2 map below 1x1") as info:
        load_space(path)
    assert info.value.key == "stages.count" and str(path) in str(info.value)
    assert "at most 1" in str(info.value)  # the advice is actionable
    fixed = load_space(write_space(variant(('padding = "same"', 'padding = "valid"'), ("count = [1, 3]", "count = 1"),
                                           ("kernel = 3", "kernel = [3, 5]"))))
    assert fixed.stage_count == (1, 1)


def test_file_level_mistakes(tmp_path):
    with pytest.raises(SearcherError, match="not found"):
        load_space(tmp_path / "missing.toml")
    broken = tmp_path / "broken.toml"
    broken.write_text("[input\nchannels = 1\n")
    with pytest.raises(SearcherError, match="not valid TOML") as info:
        load_space(broken)
    assert str(broken) in str(info.value)
    with pytest.raises(SearcherError, match="did you mean 'mcu'"):
        builtin_space("mcuu")


def test_the_tiny_space_reads_as_written(write_space):
    space = load_space(write_space())
    assert space.resolutions == ((12, 12), (16, 16)) and space.stage_count == (1, 3)
    assert [space.stage_width(i, 2) for i in range(3)] == [2, 4, 8]
    assert [space.stage_width(i, 4) for i in range(3)] == [4, 8, 8]  # capped by max_width
    assert space.budget.max_params == 300 and space.budget.max_macs == 20_000


TINY_VARIANTS = {
    "tiny": TINY_SPACE,
    "small": SMALL,
    "fixed_depth_two_hidden": variant(("count = [1, 3]", "count = 2"), ("hidden = [0, 1]", "hidden = [1, 2]"),
                                      ('activation = ["relu", "tanh"]', 'activation = "relu"')),
    "per_stage_convs": variant(("convs = [1, 2]", "convs = [[1, 1], [1, 3], [2, 2]]"),
                               ('features = ["gap", "flatten"]', 'features = "gap"'),
                               ("dropout = 0.0", "dropout = [0.0, 0.5]")),
}


@pytest.mark.parametrize("name", TINY_VARIANTS)
def test_size_equals_enumeration_without_duplicates(write_space, name):
    space = load_space(write_space(TINY_VARIANTS[name]))
    texts = [arch.to_text() for arch in space.enumerate()]
    assert len(texts) == space.size()
    assert len(set(texts)) == len(texts)
    # depth shares of the enumeration follow the depth decision's weights (the rest multiplies every depth alike)
    depths = Counter(t.count("_") - 2 - t.endswith("_bn") for t in texts)
    lo, hi = space.stage_count
    shares = [depths[d] for d in range(lo, hi + 1)]
    weights = space.weights(space.decision("stages"))
    assert [s * weights[0] for s in shares] == [c * shares[0] for c in weights]


def test_random_is_deterministic_and_inside_the_space(write_space):
    space = load_space(write_space())
    every = {arch.to_text() for arch in space.enumerate()}
    for seed in range(300):
        arch = space.random(seed)
        assert arch == space.random(seed) == space.random(random.Random(seed))
        assert arch.to_text() in every
    assert len({space.random(seed) for seed in range(50)}) > 40


def inside(space: Space, arch: Arch) -> bool:
    """Membership by the space's rules, for spaces too big to enumerate."""
    lo, hi = space.stage_count
    widths = [tuple(c.out_channels for c in s.convs) for s in arch.stages]
    return (arch.input_shape[1:] in space.resolutions and lo <= arch.depth <= hi
            and any(widths == [(space.stage_width(i, f),) * len(w) for i, w in enumerate(widths)]
                    for f in space.first_width)
            and all(space.stage_convs(i)[0] <= len(s.convs) <= space.stage_convs(i)[1]
                    and len({c.kernel for c in s.convs}) == 1 and s.convs[0].kernel in space.kernels
                    and all(c.padding == space.padding and c.stride == space.stride for c in s.convs)
                    and (s.pool.kind if s.pool else "none") in space.pools
                    for i, s in enumerate(arch.stages))
            and arch.activation in space.activations and arch.batch_norm in space.batch_norm
            and arch.head.features in space.features and arch.head.dropout in space.dropouts
            and space.hidden_count[0] <= len(arch.head.hidden) <= space.hidden_count[1]
            and set(arch.head.hidden) <= set(space.hidden_widths))


@pytest.mark.parametrize("name", SHIPPED_SPACES)
def test_random_draws_of_shipped_spaces_are_inside(shipped, name):
    space = shipped[name]
    for seed in range(200):
        arch = space.random(seed, classes=3)
        assert inside(space, arch) and arch.head.classes == 3, arch
    other = shipped["classic" if name != "classic" else "mcu"]
    assert not any(inside(other, space.random(seed)) for seed in range(50))  # the check can fail


def test_random_draws_are_uniform_over_configurations(write_space):
    space = load_space(write_space(SMALL))
    configs = [arch.to_text() for arch in space.enumerate()]
    assert len(configs) == 18
    rng = random.Random(1)
    draws = 9_000
    counts = Counter(space.random(rng).to_text() for _ in range(draws))
    assert set(counts) == set(configs)
    expected = draws / len(configs)
    chi2 = sum((counts[c] - expected) ** 2 / expected for c in configs)
    assert chi2 < 40.79  # chi-square table: 17 degrees of freedom, upper 0.1% point


def test_depth_frequencies_follow_configuration_shares(shipped):
    space = shipped["mcu"]
    rng = random.Random(7)
    draws = 6_000
    seen = Counter(space.random(rng).depth for _ in range(draws))
    weights = space.weights(space.decision("stages"))
    total = sum(weights)
    for depth, configs in zip(range(space.stage_count[0], space.stage_count[1] + 1), weights):
        share = configs / total
        sd = (share * (1 - share) / draws) ** 0.5
        assert abs(seen[depth] / draws - share) < 4 * sd + 1e-9, (depth, seen[depth] / draws, share)


@pytest.mark.parametrize("name", SHIPPED_SPACES)
def test_optuna_suggestion_is_reproduced_by_replay(shipped, name):
    space = shipped[name]
    study = optuna.create_study(sampler=optuna.samplers.RandomSampler(seed=3))
    for _ in range(25):
        trial = study.ask()
        arch = space.suggest(trial)
        assert space.replay(trial.params) == arch
        assert inside(space, arch)
        study.tell(trial, float(arch.depth))
    assert len({t.params.get("stages") for t in study.trials}) > 1


def test_first_widths_that_round_to_the_same_network_are_refused(tmp_path):
    path = tmp_path / "dupes.toml"
    path.write_text("[stages]\ncount = [1, 2]\nfirst_width = [8, 9]\nround_to = 8\n")
    with pytest.raises(SearcherError, match=r"`stages.first_width` choices 8 and 9 give the same stage widths") as info:
        load_space(path)
    assert info.value.file == str(path)


def test_reading_a_space_never_imports_torch():
    """The cost layer stays torch-free: a census or cost table must not pay for importing torch."""
    import subprocess
    import sys

    code = ("import sys; from searcher.core.space_file import load_space, builtin_space; from searcher.core.census_report import "
            "run_census; run_census(load_space(builtin_space('classic'))); print('torch' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "False"


@pytest.mark.slow
def test_a_built_wheel_carries_the_shipped_spaces(tmp_path):
    """Built-in space names work from a plain (non-editable) install, not only from a clone."""
    import subprocess
    import sys
    import zipfile

    root = Path(__file__).resolve().parent.parent
    build = subprocess.run([sys.executable, "-m", "pip", "wheel", "-q", "--no-deps", "--no-build-isolation",
                            "-w", str(tmp_path / "wheel"), str(root)], capture_output=True, text=True)
    assert build.returncode == 0, build.stderr[-2000:]
    (wheel,) = (tmp_path / "wheel").glob("searcher-*.whl")
    shipped = sorted(p.name for p in (root / "spaces").glob("*.toml"))
    with zipfile.ZipFile(wheel) as archive:
        assert sorted(Path(n).name for n in archive.namelist() if n.startswith("searcher/spaces/")) == shipped
        archive.extractall(tmp_path / "site")
    check = subprocess.run(
        [sys.executable, "-c", "import searcher, sys; from searcher.core.space_file import builtin_space; "
         "p = builtin_space('mcu'); searcher.load_space(p); print(p)"],
        cwd=tmp_path, capture_output=True, text=True, env={**os.environ, "PYTHONPATH": str(tmp_path / "site")})
    assert check.returncode == 0, check.stderr[-2000:]
    assert Path(check.stdout.strip()).is_relative_to(tmp_path / "site")


# -- issue 8: values that crashed, hung or were misexplained ---------------------------------------
BIG = 2**64 + 1  # beyond 64 bits: numpy raised OverflowError on these, Python would allocate terabytes


@pytest.mark.parametrize(("changes", "key", "says"), [
    ([("sizes = [[12, 12], [16, 16]]", f"sizes = [[12, {BIG}]]")], "input.sizes", "from 1 to 1,024"),
    ([("first_width = [2, 4]", f"first_width = [2, {BIG}]")], "stages.first_width", "from 1 to 4,096"),
    ([("max_width = 8", f"max_width = {BIG}")], "stages.max_width", "from 1 to 4,096"),
    ([("kernel = 3", f"kernel = {BIG}")], "conv.kernel", "from 1 to 31"),
    ([("classes = 4", f"classes = {BIG}")], "input.classes", "from 2 to 100,000"),
    ([("hidden_width = [3, 5]", "hidden_width = [3, 1000000000]")], "head.hidden_width", "from 1 to 4,096"),
    ([("convs = [1, 2]", "convs = [1, 1000000]")], "stages.convs", r"within 1 to 10"),  # the census ran for minutes
    ([("count = [1, 3]", "count = [1, 50]")], "stages.count", r"within 1 to 10"),
    ([("growth = 2.0", "growth = nan")], "stages.growth", r"number in \(0, 16\], got nan"),
    ([("growth = 2.0", "growth = inf")], "stages.growth", r"got inf"),
    ([("channels = 1", "channels = 2")], "input.channels", "got 2"),  # the census accepted 2 and 5 channels
    ([("channels = 1", "channels = 5")], "input.channels", "got 5"),
    ([('max_params = "300"', 'weight_precision = ["int8"]')], "budget.weight_precision", r"got \['int8'\]"),
    ([('max_params = "300"', 'activation_precision = { kind = "int8" }')], "budget.activation_precision", "got"),
    ([('max_params = "300"', 'max_params = 0.4')], "budget.max_params", "rounds to 0"),
    ([("window = 2", "window = 2\nstride = 99999999999999999999999")], "pool.stride", "from 1 to 1,024"),
    ([("kernel = 3", "kernel = [" + ", ".join(["3"] * 65) + "]")], "conv.kernel", "at most 64"),
    ([('name = "tiny"', "name = 5")], "name", "text in quotes, got 5"),
    ([('name = "tiny"', 'name = "' + "x" * 100_000 + '"')], "name", "at most 80 characters"),
    ([('name = "tiny"', 'name = "tiny\\u0007"')], "name", "printable"),
    ([("growth = 2.0", "growth = 16.0"), ("max_width = 8", ""), ("count = [1, 3]", "count = [1, 4]"),
      ('kind = ["max", "none"]', 'kind = "none"')], "stages.growth", "stop at 4,096: set `stages.max_width`"),
], ids=lambda v: v if isinstance(v, str) and len(v) < 40 else None)
def test_values_beyond_the_ceilings_are_refused_by_key(write_space, changes, key, says):
    path = write_space(variant(*changes))
    with pytest.raises(SearcherError, match=says) as info:
        load_space(path)
    assert info.value.key == key and f"`{key}`" in str(info.value)
    assert len(str(info.value)) < 400  # values are cut to a readable length


@pytest.mark.parametrize("section", ["budget = 5", "budget = [1, 2]", "[[budget]]\nmax_params = 1", "train = 3"])
def test_budget_and_train_must_be_tables(tmp_path, section):
    path = tmp_path / "space.toml"
    path.write_text(f"{section}\n")
    with pytest.raises(SearcherError, match="must be a table") as info:
        load_space(path)
    assert info.value.key in ("budget", "train")


def test_a_byte_order_mark_is_read_past(write_space):
    """Editors on Windows write one; it was reported as 'Invalid statement'."""
    path = write_space()
    path.write_bytes(b"\xef\xbb\xbf" + path.read_bytes())
    assert load_space(path).name == "tiny"


@pytest.mark.parametrize(("changes", "key", "says"), [
    # a stride that takes the map to 1x1 before the 2x2 pool: the first stage cannot be saved by fewer stages
    ([("kernel = 3", "kernel = 3\nstride = 16")], "conv.stride", r"to 1x1, smaller than the 2x2 pooling window"),
    ([("window = 2", "window = 13")], "pool.window", r"`pool.window` of at most 12"),
    ([('padding = "same"', 'padding = "valid"'), ("kernel = 3", "kernel = 13")], "conv.kernel",
     "smallest input 12x12 below 1x1"),
])
def test_a_first_stage_that_cannot_fit_names_what_to_change(write_space, changes, key, says):
    with pytest.raises(SearcherError, match=says) as info:
        load_space(write_space(variant(*changes)))
    assert info.value.key == key
    assert "at most 0" not in str(info.value)  # issue 8: "lower stages.count to at most 0"
