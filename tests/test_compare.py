"""Comparison runs: variant declaration, one read fanned out, event matching, ground-truth scores, sweeps."""

from __future__ import annotations

import argparse
import itertools
import json
import tomllib
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from impactline.compare import (
    TRUTH,
    agreement_table,
    compare,
    compare_recording,
    format_comparison,
    load_comparison,
    load_truth,
    match_events,
    match_intervals,
    parse_sweep_values,
    register_cli,
    score_against_truth,
    sweep,
)
from impactline.errors import InputError, PipelineError
from impactline.pipeline import load_pipeline
from impactline.runner import process_recording

FS = 100e3
NOISE = 1e-12
# Five clear rectangular pulses (20 x the noise bound, 2 ms) and one faint one (0.5 x): sample positions.
BIG = (20_000, 50_000, 90_000, 130_000, 170_000)
FAINT = 110_000
WIDTH = 200


def _recording(folder: Path, name: str = "hand", n: int = 200_000, seed: int = 4) -> Path:
    """Bounded noise plus the pulses above, as NAME.npy with its NAME.json sidecar.

    The noise is uniform in [-NOISE, NOISE]: its robust sigma (1.4826 MAD) is 0.74 NOISE, so 5 sigmas is
    3.7 NOISE, which noise alone (|x| <= NOISE, and no more after a Bessel low-pass whose impulse response has
    an L1 norm close to 1) or the faint pulse (at most 1.5 NOISE) can never reach, while the clear pulses
    (20 NOISE) always do. So the detections can be counted by hand: exactly the five clear pulses.
    """
    rng = np.random.default_rng(seed)
    x = NOISE * rng.uniform(-1.0, 1.0, n)
    for s in BIG:
        x[s:s + WIDTH] += 20 * NOISE
    x[FAINT:FAINT + WIDTH] += 0.5 * NOISE
    path = folder / f"{name}.npy"
    np.save(path, x)
    (folder / f"{name}.json").write_text(json.dumps({"sample_rate_hz": FS}))
    return path


COMPARISON = """
[comparison]
name = "hand"
chunk_samples = {chunk}

[[variant]]
name = "raw-k5"
[variant.detector]             # release at 1 sigma: starts within a few samples of the pulses
use = "threshold"
release_sigma = 1
k_sigma = 5

[[variant]]
name = "bessel-k5"
[[variant.filter]]
use = "bessel"
cutoff = "20 kHz"
[variant.detector]
use = "threshold"
release_sigma = 1
k_sigma = 5

[[variant]]
name = "bessel-k6"
[[variant.filter]]
use = "bessel"
cutoff = "20 kHz"
[variant.detector]
use = "threshold"
release_sigma = 1
k_sigma = 6
[[variant.measure]]
use = "pulse-shape"
"""


def _comparison_file(folder: Path, chunk: int = 1 << 20, text: str = COMPARISON) -> Path:
    path = folder / "variants.toml"
    path.write_text(text.format(chunk=chunk))
    return path


def _hand_truth_csv(folder: Path) -> Path:
    """A hand count: the first four clear pulses and the faint one; the fifth clear pulse was overlooked."""
    lines = ["file,start_s,end_s,label"]
    for s in BIG[:4]:
        lines.append(f"hand,{s / FS},{(s + WIDTH) / FS},clear")
    lines.append(f"hand.npy,{FAINT / FS},{(FAINT + WIDTH) / FS},faint")
    path = folder / "marks.csv"
    path.write_text("\n".join(lines) + "\n")
    return path


def _assert_tables_equal(a: pa.Table, b: pa.Table) -> None:
    assert a.column_names == b.column_names
    for name in a.column_names:
        x, y = a.column(name).to_pylist(), b.column(name).to_pylist()
        if a.schema.field(name).type in (pa.float64(), pa.float32()):
            np.testing.assert_array_equal(np.array(x, dtype=float), np.array(y, dtype=float), err_msg=name)
        else:
            assert x == y, name


# ------------------------------------------------------------------------------------------------ matching
def _brute_force_best(a, b):
    """Largest total overlap over every one-to-one matching of overlapping pairs (exhaustive reference)."""
    def overlap(i, j):
        return max(0, min(a[i][1], b[j][1]) - max(a[i][0], b[j][0]))

    best = 0
    for k in range(min(len(a), len(b)) + 1):
        for chosen_a in itertools.combinations(range(len(a)), k):
            for chosen_b in itertools.permutations(range(len(b)), k):
                pairs = list(zip(chosen_a, chosen_b, strict=True))
                if all(overlap(i, j) > 0 for i, j in pairs):
                    best = max(best, sum(overlap(i, j) for i, j in pairs))
    return best


def _match(a, b):
    return match_intervals([s for s, _ in a], [e for _, e in a], [s for s, _ in b], [e for _, e in b])


def test_identical_events_all_match_with_zero_differences():
    events = [(100, 150), (300, 420), (1000, 1001), (5000, 7000)]
    m = _match(events, events)
    assert m.a.tolist() == [0, 1, 2, 3] and m.b.tolist() == [0, 1, 2, 3]
    assert m.overlap.tolist() == [50, 120, 1, 2000]
    table = _events_table("f", events, FS)
    agreement = agreement_table(match_events(table, table, FS, name_a="x", name_b="y")).to_pylist()[0]
    assert (agreement["matched"], agreement["only_a"], agreement["only_b"]) == (4, 0, 0)
    assert agreement["jaccard"] == 1.0
    assert agreement["onset_diff_median_s"] == 0.0 and agreement["onset_diff_iqr_s"] == 0.0
    assert agreement["charge_diff_median_C"] == 0.0


def test_shifted_events_match_while_they_overlap_and_report_the_shift():
    a = [(100, 200), (400, 500), (900, 1000)]
    shifted = [(s + 30, e + 30) for s, e in a]
    m = _match(a, shifted)
    assert m.a.tolist() == [0, 1, 2] and m.b.tolist() == [0, 1, 2] and m.overlap.tolist() == [70, 70, 70]
    rows = match_events(_events_table("f", a, FS), _events_table("f", shifted, FS), FS).to_pylist()
    assert [r["onset_diff_s"] for r in rows] == pytest.approx([30 / FS] * 3, abs=1e-15)
    # Shifted by exactly the duration: the intervals touch (half-open) but do not overlap.
    touching = [(s + 100, e + 100) for s, e in a]
    assert _match(a, touching).a.size == 0
    agreement = agreement_table(match_events(_events_table("f", a, FS), _events_table("f", touching, FS),
                                             FS)).to_pylist()[0]
    assert (agreement["matched"], agreement["only_a"], agreement["only_b"], agreement["jaccard"]) == (0, 3, 3, 0.0)


def test_split_event_matches_the_piece_that_starts_with_it():
    whole = [(1000, 2000)]
    pieces = [(1000, 1400), (1600, 2000)]  # equal overlaps (400 each): the tie goes to the same onset
    m = _match(whole, pieces)
    assert (m.a.tolist(), m.b.tolist(), m.overlap.tolist()) == ([0], [0], [400])
    assert m.group_a.tolist() == [0] and m.group_b.tolist() == [0, 0]
    unequal = [(1000, 1300), (1500, 2000)]  # the larger overlap wins over the equal onset
    m = _match(whole, unequal)
    assert (m.b.tolist(), m.overlap.tolist()) == ([1], [500])
    rows = match_events(_events_table("f", whole, FS), _events_table("f", pieces, FS), FS).to_pylist()
    assert sorted(r["outcome"] for r in rows) == ["matched", "only_b"]


def test_merged_events_match_one_piece_and_leave_the_other():
    pieces = [(1000, 1400), (1600, 2000), (5000, 5100)]
    merged = [(1000, 2000), (5000, 5100)]
    m = _match(pieces, merged)
    assert (m.a.tolist(), m.b.tolist()) == ([0, 2], [0, 1])
    agreement = agreement_table(match_events(_events_table("f", pieces, FS), _events_table("f", merged, FS),
                                             FS)).to_pylist()[0]
    assert (agreement["matched"], agreement["only_a"], agreement["only_b"]) == (2, 1, 0)
    assert agreement["jaccard"] == pytest.approx(2 / 3)


def test_matching_maximises_total_overlap_where_greedy_would_not():
    # Greedy (largest overlap first) takes A0-B1 (10) and strands A1 and B0: total 10. Best: A0-B0 + A1-B1 = 18.
    a = [(0, 20), (21, 30)]
    b = [(0, 9), (10, 30)]
    m = _match(a, b)
    assert (m.a.tolist(), m.b.tolist(), int(m.overlap.sum())) == ([0, 1], [0, 1], 18)


def test_matching_equals_exhaustive_search_on_random_cases():
    rng = np.random.default_rng(11)
    for _ in range(150):
        def draw(n):
            starts = rng.integers(0, 60, n)
            return [(int(s), int(s + rng.integers(1, 25))) for s in starts]

        a, b = draw(int(rng.integers(0, 5))), draw(int(rng.integers(0, 5)))
        m = _match(a, b)
        assert len(set(m.a.tolist())) == m.a.size and len(set(m.b.tolist())) == m.b.size  # one to one
        assert np.all(m.overlap > 0)
        assert int(m.overlap.sum()) == _brute_force_best(a, b), (a, b)


def _events_table(file: str, intervals, fs: float, charges=None, snr=None) -> pa.Table:
    n = len(intervals)
    return pa.table({
        "file": [file] * n, "event_id": list(range(n)),
        "start_s": [s / fs for s, _ in intervals], "end_s": [e / fs for _, e in intervals],
        "charge_C": list(charges) if charges is not None else [1e-15] * n,
        "snr": list(snr) if snr is not None else [10.0] * n,
    })


# ------------------------------------------------------------------------------------------------ truth scores
def test_scores_by_hand_on_constructed_tables(tmp_path: Path):
    # Truth: five events; detections: three of them (one split in two pieces), one false alarm.
    truth_file = tmp_path / "truth.csv"
    truth_file.write_text("file,start_s,end_s,label,snr,charge_C\n"
                          "rec,0.010,0.011,spike,20,2e-15\n"
                          "rec,0.020,0.021,spike,20,2e-15\n"
                          "rec,0.030,0.031,blip,4,1e-15\n"
                          "rec,0.040,0.041,blip,4,1e-15\n"
                          "rec,0.050,0.052,spike,9,3e-15\n")
    truth = load_truth(truth_file, ["data/rec.bin"])
    assert truth.files == ["data/rec.bin"]
    detections = pa.table({
        "file": ["data/rec.bin"] * 5, "event_id": [0, 1, 2, 3, 4],
        "start_s": [0.0101, 0.0202, 0.0500, 0.0512, 0.0700], "end_s": [0.0110, 0.0210, 0.0511, 0.0520, 0.0710],
        "onset_s": [0.01003, 0.02001, 0.04999, 0.0513, 0.0701],
        "charge_C": [2.2e-15, 1.9e-15, 1.6e-15, 1.4e-15, 0.5e-15], "snr": [19.0, 18.0, 9.5, 8.5, 4.5]})
    scores = {(r["stratum"], r["value"]): r for r in score_against_truth(
        truth, detections, FS, durations={"data/rec.bin": 2.0}, variant="v").to_pylist()}
    everything = scores[("all", "all")]
    # By hand: matched 0.010, 0.020 and 0.050 (by its first, larger piece): tp 3, fn 2 (both blips),
    # fp 2 (the second piece of the split event and the false alarm at 0.070).
    assert (everything["tp"], everything["fn"], everything["fp"], everything["n_truth"]) == (3, 2, 2, 5)
    assert everything["precision"] == pytest.approx(3 / 5) and everything["recall"] == pytest.approx(3 / 5)
    assert everything["f1"] == pytest.approx(3 / 5)
    assert everything["false_per_s"] == pytest.approx(2 / 2.0)
    assert everything["start_error_median_s"] == pytest.approx(0.0001)  # starts off by 0.1, 0.2 and 0 ms
    # onset_s of the same matched detections: off by +30, +10 and -10 us; median +10 us.
    assert everything["onset_error_median_s"] == pytest.approx(1e-5)
    without = score_against_truth(truth, detections.drop_columns(["onset_s"]), FS, variant="v").to_pylist()[0]
    assert without["onset_error_median_s"] == pytest.approx(0.0001)   # no onset_s: the start is the onset
    assert scores[("class", "spike")]["recall"] == 1.0 and scores[("class", "blip")]["recall"] == 0.0
    assert scores[("class", "spike")]["fp"] is None and scores[("class", "spike")]["precision"] is None
    # SNR bands: recall by the true snr, precision by the detections' measured snr.
    band = scores[("snr", "[3, 5)")]
    assert (band["n_truth"], band["tp"], band["fp"], band["precision"]) == (2, 0, 1, 0.0)
    band = scores[("snr", "[8, 12)")]  # truth at snr 9 matched; detections at 9.5 (matched) and 8.5 (split piece)
    assert (band["n_truth"], band["tp"], band["fp"], band["precision"]) == (1, 1, 1, 0.5)
    # Relative charge errors of the matched events: +10 %, -5 %, -46.7 %; median -5 %.
    assert everything["charge_error_rel_median"] == pytest.approx(-0.05)


def test_ground_truth_scores_agree_with_a_hand_count(tmp_path: Path):
    recording = _recording(tmp_path)
    comparison = load_comparison(_comparison_file(tmp_path))
    result = compare(comparison, [recording], tmp_path / "out", truth=_hand_truth_csv(tmp_path))
    # The hand count of the recording: five clear pulses, each found once by every variant at its place.
    for name in ("raw-k5", "bessel-k5"):
        starts = result.events[name].column("start_index").to_pylist()
        assert len(starts) == 5 and all(abs(s - p) <= 3 for s, p in zip(starts, BIG, strict=True)), starts
    # Hand marks list four of the five clear pulses and the faint one: tp 4, fp 1 (the overlooked pulse),
    # fn 1 (the faint pulse, below any threshold): precision = recall = 4/5.
    scores = {(r["variant"], r["stratum"], r["value"]): r for r in result.scores.to_pylist()}
    for name in ("raw-k5", "bessel-k5"):
        row = scores[(name, "all", "all")]
        assert (row["tp"], row["fp"], row["fn"]) == (4, 1, 1)
        assert row["precision"] == 0.8 and row["recall"] == 0.8
        assert scores[(name, "class", "clear")]["recall"] == 1.0
        assert scores[(name, "class", "faint")]["recall"] == 0.0
    summary = {r["variant"]: r for r in result.summary.to_pylist()}
    assert summary["raw-k5"]["precision"] == 0.8 and summary["raw-k5"]["n_truth"] == 5
    text = format_comparison(result)
    assert "precision" in text and "class faint" in text


def test_truth_beside_the_recording_is_found_and_bad_truth_is_refused(tmp_path: Path):
    recording = _recording(tmp_path)
    truth = pa.table({"start_s": [BIG[0] / FS], "end_s": [(BIG[0] + WIDTH) / FS], "shape": ["spike"],
                      "snr": [20.0], "charge_C": [1e-15], "signal_charge_C": [20 * NOISE * WIDTH / FS]})
    pq.write_table(truth, tmp_path / "hand.truth.parquet")
    comparison = load_comparison(_comparison_file(tmp_path))
    result = compare(comparison, [tmp_path], None)  # a folder: the truth file is not taken as a recording
    assert result.files.num_rows == 3
    row = next(r for r in result.scores.to_pylist() if r["variant"] == "raw-k5" and r["stratum"] == "all")
    assert (row["tp"], row["fp"], row["fn"]) == (1, 4, 0)
    # signal_charge_C is the true charge: 20 pA for 2 ms; the detected charge is within a few percent.
    assert abs(row["charge_error_rel_median"]) < 0.05
    bad = tmp_path / "bad.csv"
    bad.write_text("file,start_s\nhand,0.1\n")
    with pytest.raises(InputError, match="end_s"):
        load_truth(bad, [recording])
    bad.write_text("file,start_s,end_s\nhand,0.2,0.1\n")
    with pytest.raises(InputError, match="row 0"):
        load_truth(bad, [recording])
    bad.write_text("file,start_s,end_s\nother,0.1,0.2\n")
    with pytest.raises(InputError, match="names none of the recordings"):
        load_truth(bad, [recording])


# ------------------------------------------------------------------------------------------------ one read
def test_each_variant_equals_a_plain_run_of_its_pipeline(tmp_path: Path):
    recording = _recording(tmp_path)
    comparison = load_comparison(_comparison_file(tmp_path, chunk=7919))  # odd chunks: chunking changes nothing
    outcome = compare_recording(comparison, recording)
    assert outcome.ok
    for variant, row in zip(comparison.variants, outcome.rows, strict=True):
        plain = process_recording(variant.pipeline, recording)
        alone, ours = plain.events, outcome.events[variant.name]
        assert row["noise_rms_A"] == plain.row["noise_rms_A"]  # measured once per shared chain, same figure
        assert ours.column("variant").to_pylist() == [variant.name] * ours.num_rows
        _assert_tables_equal(ours.drop_columns(["variant"]), alone)
        assert ours.schema.metadata[b"impactline.pipeline_hash"] == alone.schema.metadata[b"impactline.pipeline_hash"]


def test_shared_filters_run_once_per_chunk(tmp_path: Path, monkeypatch):
    from impactline_plugins.filters.bessel import Bessel

    calls = []
    original = Bessel.process

    def counting(self, x, state):
        calls.append(x.size)
        return original(self, x, state)

    monkeypatch.setattr(Bessel, "process", counting)
    recording = _recording(tmp_path)
    comparison = load_comparison(_comparison_file(tmp_path, chunk=50_000))
    assert comparison.filter_passes() == (1, 2)  # bessel-k5 and bessel-k6 share one Bessel stage
    compare_recording(comparison, recording)  # also computes each chain's bandwidth once (a step response)
    calls.clear()
    compare_recording(comparison, recording)
    assert calls == [50_000] * 4  # one pass over the file, in four chunks, for both variants


def test_common_filter_prefixes_are_shared(tmp_path: Path):
    text = """
[[filter]]
use = "bessel"
cutoff = "20 kHz"
[[variant]]
name = "a"
[variant.detector]
use = "threshold"
[[variant]]
name = "b"
[[variant.filter]]
use = "bessel"
cutoff = "5 kHz"
[variant.detector]
use = "threshold"
[[variant]]
name = "c"
[[variant.filter]]
use = "bessel"
cutoff = "5000 Hz"
[variant.detector]
use = "threshold"
k_sigma = 4
[[variant]]
name = "d"
inherit_filters = false
[variant.detector]
use = "threshold"
"""
    comparison = load_comparison(_comparison_file(tmp_path, text=text))
    # a, b, c share the 20 kHz stage; b and c also share the 5 kHz stage ("5 kHz" == "5000 Hz" once resolved).
    assert comparison.filter_passes() == (2, 5)
    tree = comparison.filter_tree_summary()
    assert tree["variants"] == ["d"] and tree["children"][0]["variants"] == ["a"]
    assert tree["children"][0]["children"][0]["variants"] == ["b", "c"]
    outcome = compare_recording(comparison, _recording(tmp_path))
    for variant in comparison.variants:
        _assert_tables_equal(outcome.events[variant.name].drop_columns(["variant"]),
                             process_recording(variant.pipeline, tmp_path / "hand.npy").events)


def test_a_failing_variant_leaves_the_others_intact(tmp_path: Path):
    text = COMPARISON + """
[[variant]]
name = "too-high"
[[variant.filter]]
use = "bessel"
cutoff = "80 kHz"
[variant.detector]
use = "threshold"
"""
    recording = _recording(tmp_path)
    result = compare(load_comparison(_comparison_file(tmp_path, text=text)), [recording], tmp_path / "out")
    status = {r["variant"]: r for r in result.files.to_pylist()}
    assert status["too-high"]["status"] == "failed" and "Nyquist" in status["too-high"]["error"] or \
        "cutoff" in status["too-high"]["error"]
    assert all(status[n]["status"] == "ok" for n in ("raw-k5", "bessel-k5", "bessel-k6"))
    assert result.failed == [str(recording)]
    assert result.events["too-high"].num_rows == 0 and result.events["raw-k5"].num_rows == 5


# ------------------------------------------------------------------------------------------------ declaring
def test_pipeline_files_become_variants_named_after_the_files(tmp_path: Path):
    for name, k in (("strict", 6), ("loose", 4)):
        (tmp_path / f"{name}.toml").write_text(f'[[filter]]\nuse = "bessel"\ncutoff = "20 kHz"\n'
                                               f'[detector]\nuse = "threshold"\nk_sigma = {k}\n')
    comparison = load_comparison([tmp_path / "strict.toml", tmp_path / "loose.toml"])
    assert comparison.names == ["strict", "loose"]
    assert comparison.filter_passes() == (1, 2)
    for variant in comparison.variants:
        assert variant.pipeline.hash == load_pipeline(tmp_path / f"{variant.name}.toml").hash
        # The standalone text written to the comparison folder resolves to the same pipeline.
        (tmp_path / "regen.toml").write_text(variant.text)
        assert load_pipeline(tmp_path / "regen.toml").hash == variant.pipeline.hash
    (tmp_path / "other-reader.toml").write_text('[reader]\nuse = "numpy"\n[detector]\nuse = "threshold"\n')
    with pytest.raises(PipelineError, match="same \\[reader\\]"):
        load_comparison([tmp_path / "strict.toml", tmp_path / "other-reader.toml"])


@pytest.mark.parametrize("body, expected", [
    ('[[variant]]\nname = "a"\n[[variant.filter]]\nuse = "bessel"\ncutof = "1 kHz"\n[variant.detector]\n'
     'use = "threshold"\n', "variant[0].filter[0].cutof"),
    ('[[filter]]\nuse = "bessel"\ncutoff = "-3 kHz"\n[[variant]]\nname = "a"\n[variant.detector]\nuse = "threshold"\n',
     "filter[0].cutoff"),
    ('[[variant]]\nname = "a"\n[variant.detector]\nuse = "threshold"\nk_sigma = "x"\n',
     "variant[0].detector.k_sigma"),
    ('[[variant]]\nname = "a"\n', "variant[0].detector: missing"),
    ('[[variant]]\nname = "truth"\n[variant.detector]\nuse = "threshold"\n', "reserved"),
    ('[[variant]]\nname = "a b"\n[variant.detector]\nuse = "threshold"\n', "variant[0].name"),
    ('[[variant]]\nname = "a"\ndetektor = 1\n[variant.detector]\nuse = "threshold"\n', "did you mean 'detector'"),
    ('[comparison]\nname = "x"\n[detector]\nuse = "threshold"\n', "[detector]: unknown section"),
    ('[[variant]]\nname = "a"\n[variant.detector]\nuse = "threshold"\n[[variant]]\nname = "a"\n'
     '[variant.detector]\nuse = "threshold"\n', "declared twice"),
])
def test_declaration_errors_name_the_key(tmp_path: Path, body: str, expected: str):
    path = tmp_path / "bad.toml"
    path.write_text(body)
    with pytest.raises(PipelineError) as info:
        load_comparison(path)
    assert any(expected in p and str(path) in p for p in info.value.problems), info.value.problems


def test_generated_pipeline_text_round_trips_awkward_values():
    from impactline.compare import VariantRecipe

    recipe = VariantRecipe(name="x", description='quote " back\\slash\ttab \u00b5 \x7f', filters=[
        ("bessel", {"cutoff": "20 kHz", "order": 4})], detector=("threshold", {"k_sigma": 4.5e-0, "noise_rms": 1e-12,
                                                                               "polarity": "both"}),
        sizing={"material": "Cu", "electrons": 2.0})
    data = tomllib.loads(recipe.text())
    assert data["pipeline"]["description"] == recipe.description
    assert data["filter"] == [{"use": "bessel", "cutoff": "20 kHz", "order": 4}]
    assert data["detector"] == {"use": "threshold", "k_sigma": 4.5, "noise_rms": 1e-12, "polarity": "both"}
    assert data["sizing"] == {"material": "Cu", "electrons": 2.0}


# ------------------------------------------------------------------------------------------------ folder and CLI
def _cli(argv: list[str]) -> int:
    parser = argparse.ArgumentParser(prog="impactline")
    register_cli(parser.add_subparsers(dest="command"))
    args = parser.parse_args(argv)
    return args.func(args)


def test_compare_command_writes_the_comparison_folder(tmp_path: Path, capsys):
    recording = _recording(tmp_path)
    spec = _comparison_file(tmp_path)
    out = tmp_path / "out"
    code = _cli(["compare", str(spec), str(recording), "--out", str(out), "--truth", str(_hand_truth_csv(tmp_path)),
                 "--quiet"])
    printed = capsys.readouterr().out
    assert code == 0
    assert "raw-k5" in printed and "Jaccard" in printed and "recall" in printed
    for name in ("comparison.json", "files.parquet", "matches.parquet", "agreement.parquet", "summary.parquet",
                 "scores.parquet", "events/raw-k5.parquet", "variants/bessel-k6.toml"):
        assert (out / name).exists(), name
    events = pq.read_table(out / "events" / "bessel-k6.parquet")
    assert events.schema.field("start_s").metadata[b"unit"] == b"s"
    assert events.schema.field("charge_C").metadata[b"unit"] == b"C"
    assert "rise_time_s" in events.column_names  # the variant's own measure
    assert set(events.column("variant").to_pylist()) == {"bessel-k6"}
    agreement = pq.read_table(out / "agreement.parquet")
    assert agreement.schema.field("onset_diff_median_s").metadata[b"unit"] == b"s"
    assert agreement.num_rows == 3
    matches = pq.read_table(out / "matches.parquet")
    assert TRUTH in matches.column("variant_a").to_pylist()
    record = json.loads((out / "comparison.json").read_text())
    assert record["filter_sharing"]["stages_run_per_file"] == 1
    # The exported variant reproduces the events through an ordinary run.
    again = process_recording(load_pipeline(out / "variants" / "bessel-k6.toml"), recording).events
    _assert_tables_equal(events.drop_columns(["variant"]).replace_schema_metadata(None),
                         again.replace_schema_metadata(None))
    # The same folder with a different comparison is refused (exit 2) unless --overwrite.
    other = tmp_path / "other.toml"
    other.write_text('[detector]\nuse = "threshold"\nk_sigma = 7\n')
    assert _cli(["compare", str(other), str(recording), "--out", str(out), "--quiet"]) == 2
    assert "different comparison" in capsys.readouterr().err
    assert _cli(["compare", str(other), str(recording), "--out", str(out), "--quiet", "--overwrite"]) == 0
    assert not (out / "events" / "raw-k5.parquet").exists()


def test_compare_command_exit_codes_for_bad_input_and_failed_files(tmp_path: Path, capsys):
    recording = _recording(tmp_path)
    spec = _comparison_file(tmp_path)
    assert _cli(["compare", str(recording), "--out", str(tmp_path / "o1")]) == 2
    assert "no comparison or pipeline file" in capsys.readouterr().err
    assert _cli(["compare", str(spec), str(tmp_path / "nothing*.npy"), "--out", str(tmp_path / "o2")]) == 2
    broken = tmp_path / "broken.npy"
    broken.write_bytes(b"not numpy at all")
    (tmp_path / "broken.json").write_text(json.dumps({"sample_rate_hz": FS}))
    code = _cli(["compare", str(spec), str(recording), str(broken), "--out", str(tmp_path / "o3"), "--quiet"])
    assert code == 1
    assert "FAILED" in capsys.readouterr().out
    files = pq.read_table(tmp_path / "o3" / "files.parquet").to_pylist()
    assert {r["status"] for r in files if r["file"] == str(broken)} == {"failed"}
    assert {r["status"] for r in files if r["file"] == str(recording)} == {"ok"}


# ------------------------------------------------------------------------------------------------ sweep
def test_sweep_values_syntax():
    assert parse_sweep_values("3:8:1") == [3.0, 4.0, 5.0, 6.0, 7.0, 8.0]
    assert parse_sweep_values("3:4:0.25") == [3.0, 3.25, 3.5, 3.75, 4.0]
    assert parse_sweep_values("3, 4.5,6") == [3, 4.5, 6]
    assert parse_sweep_values("10 kHz, 20 kHz") == ["10 kHz", "20 kHz"]
    for bad in ("3:8", "8:3:1", "3:8:0", "1,,2"):
        with pytest.raises(ValueError):
            parse_sweep_values(bad)


def test_sweep_gives_the_detection_curve_and_agrees_with_compare(tmp_path: Path, capsys):
    recording = _recording(tmp_path)
    truth = _hand_truth_csv(tmp_path)
    comparison = load_comparison(_comparison_file(tmp_path))
    result = sweep(comparison, [recording], "detector.k_sigma", [4, 5, 6, 30], tmp_path / "sweep", truth=truth)
    rows = result.table.to_pylist()
    assert [r["variant"] for r in rows] == ["raw-k5"] * 4 + ["bessel-k5"] * 4 + ["bessel-k6"] * 4
    assert result.table.schema.field("value").metadata[b"unit"] == b""
    at = {(r["variant"], r["value"]): r for r in rows}
    # The sweep point k = 5 is the comparison's raw-k5 variant.
    direct = compare(comparison, [recording], None, truth=truth)
    expected = next(r for r in direct.scores.to_pylist() if r["variant"] == "raw-k5" and r["stratum"] == "all")
    assert (at[("raw-k5", 5.0)]["tp"], at[("raw-k5", 5.0)]["fp"]) == (expected["tp"], expected["fp"])
    # At 30 sigmas the 20-sigma pulses vanish: no detection, recall 0.
    assert at[("raw-k5", 30.0)]["n_events"] == 0 and at[("raw-k5", 30.0)]["recall"] == 0.0
    assert (tmp_path / "sweep" / "sweep.parquet").exists() and (tmp_path / "sweep" / "sweep.json").exists()
    code = _cli(["sweep", str(_comparison_file(tmp_path)), str(recording), "--out", str(tmp_path / "s2"),
                 "--param", "filter[0].cutoff", "--values", "10 kHz,20 kHz", "--no-truth", "--quiet"])
    printed = capsys.readouterr().out
    assert code == 0 and "events per s" in printed and "not swept: raw-k5" in printed
    curve = pq.read_table(tmp_path / "s2" / "sweep.parquet")
    assert curve.schema.field("value").metadata[b"unit"] == b"Hz"
    assert sorted(set(curve.column("value").to_pylist())) == [10e3, 20e3]
    assert _cli(["sweep", str(_comparison_file(tmp_path)), str(recording), "--out", str(tmp_path / "s3"),
                 "--param", "detector.nope", "--values", "1,2", "--quiet"]) == 2


def test_parallel_files_give_the_same_tables(tmp_path: Path):
    paths = [_recording(tmp_path, name=f"r{i}", seed=i) for i in range(2)]
    comparison = load_comparison(_comparison_file(tmp_path))
    serial = compare(comparison, paths, None, truth=False)
    parallel = compare(comparison, paths, None, truth=False, jobs=2)
    for name in comparison.names:
        _assert_tables_equal(serial.events[name], parallel.events[name])
    _assert_tables_equal(serial.agreement, parallel.agreement)


def test_sweep_runs_variants_that_become_identical_once(tmp_path: Path):
    from impactline.compare import sweep_comparison

    comparison = load_comparison(_comparison_file(tmp_path))
    # bessel-k5 and bessel-k6 differ in k_sigma and in bessel-k6's own measure: never identical. raw-k5 has no
    # filter. Swept over k_sigma, each variant keeps its own pipelines: 3 x 2 expanded.
    expanded, points, skipped = sweep_comparison(comparison, "detector.k_sigma", [4, 5])
    assert len(expanded.variants) == 6 and len(points) == 6 and skipped == []
    # Two variants that differ only in the swept parameter become one pipeline per value.
    text = COMPARISON.replace('k_sigma = 6\n[[variant.measure]]\nuse = "pulse-shape"\n', 'k_sigma = 6\n')
    expanded, points, _ = sweep_comparison(load_comparison(_comparison_file(tmp_path, text=text)),
                                           "detector.k_sigma", [4, 5])
    assert len(expanded.variants) == 4 and len(points) == 6
    assert {p["name"] for p in points if p["variant"] == "bessel-k6"} == {"bessel-k5@k_sigma=4", "bessel-k5@k_sigma=5"}


def test_local_plugins_of_a_comparison_file_reach_every_variant(tmp_path: Path):
    import shutil

    shutil.copy(Path(__file__).resolve().parents[1] / "docs" / "examples" / "culab_reader.py", tmp_path / "lab.py")
    sub = tmp_path / "sub"
    sub.mkdir()
    (sub / "cmp.toml").write_text('[plugins]\nlocal = ["../lab.py"]\n[[variant]]\nname = "a"\n[variant.detector]\n'
                                  'use = "threshold"\n[[variant]]\nname = "b"\n[variant.detector]\nuse = "threshold"\n'
                                  'k_sigma = 4\n')
    comparison = load_comparison(sub / "cmp.toml")
    for variant in comparison.variants:
        assert [p.resolve() for p in variant.pipeline.local_plugins] == [(tmp_path / "lab.py").resolve()]
        # The standalone text names the plugin by an absolute path, so it loads from anywhere.
        assert tomllib.loads(variant.text)["plugins"]["local"] == [str(sub.resolve() / "../lab.py")]
        assert Path(tomllib.loads(variant.text)["plugins"]["local"][0]).is_absolute()


def test_simulator_truth_is_put_on_the_recording_clock(tmp_path: Path):
    # The simulator's truth holds electrode-current times; its recording lags them by the amplifier's delay
    # and spreads each event over the amplifier's settling time (both in the truth file's metadata).
    table = pa.table({"start_s": [0.010, 0.020], "end_s": [0.010004, 0.0205], "shape": ["blip", "spike"]})
    simulated = tmp_path / "rec.truth.parquet"
    pq.write_table(table.replace_schema_metadata({b"amplifier_delay_s": b"5e-06",
                                                  b"amplifier_settle_s": b"4e-05"}), simulated)
    truth = load_truth(simulated, recording="rec.bin")
    start = truth.events.column("start_s").to_pylist()
    end = truth.events.column("end_s").to_pylist()
    assert start == pytest.approx([0.010005, 0.020005], abs=1e-12)
    # The 4 us blip lasts the 40 us settling time; the 0.5 ms spike keeps its own (delayed) end.
    assert end == pytest.approx([0.010045, 0.020505], abs=1e-12)
    hand = tmp_path / "hand.csv"
    hand.write_text("start_s,end_s\n0.010,0.010004\n")
    assert load_truth(hand, ["rec.bin"]).events.column("start_s").to_pylist() == [0.010]
    broken = tmp_path / "broken.truth.parquet"
    pq.write_table(table.replace_schema_metadata({b"amplifier_delay_s": b"soon"}), broken)
    with pytest.raises(InputError, match=r"broken\.truth\.parquet.*amplifier_delay_s.*'soon'"):
        load_truth(broken, recording="rec.bin")
