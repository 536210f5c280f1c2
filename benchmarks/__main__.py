"""`python -m benchmarks [--quick] [--only SECTION] [--json FILE]`: test time against the
physics floor, adaptive against fixed settling, the station's own overhead, multi-site
throughput, accuracy against the simulator's truth, datalog speed, and the round trip over
HiSLIP against a raw socket. See benchmarks/README.md.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import math
import statistics
import tempfile
from pathlib import Path

import yaml

from benchmarks.datalog_speed import grow_datalog, summary_seconds, writer_rows_per_s
from benchmarks.lot_run import LotRun, run_lot
from benchmarks.machine import LoadWatch, machine_info
from benchmarks.memory import soak_rss, summary_peak_rss
from benchmarks.overhead import ideal_settings, replay, replay_through_links, station_on_ideal_bench
from benchmarks.physics_floor import FloorBench, index_floor, worst_case_wait
from benchmarks.report import TARGETS, print_report
from benchmarks.sizes import SIZES, Sizes
from benchmarks.transports import transport_round_trips
from benchmarks.truth_score import score_datalog, truth_parts
from sim_instruments.bench import SimSettings
from sim_instruments.population import make_population
from station.config.limit_tables import load_limit_table
from station.config.sequence import load_sequence
from station.demo import DEMO_LIMITS, DEMO_SEQUENCE

SEED = 11
# The timing lots and the overhead lot run the simulated bench in a process of its own
# (benchmarks/bench_process.py), as a real bench's instruments are other machines: in one
# process the station's DMM worker threads contend for the GIL with the simulator's server
# threads. The accuracy lots keep the bench in process: they are scored, not timed.
OWN_PROCESS = True
# In the order they run; `--only` takes one or more of them (comma-separated); "timing" is
# floor and multisite together, as in earlier versions.
SECTIONS = ("floor", "multisite", "accuracy", "overhead", "datalog", "summary", "soak", "transports")
ALIASES = {"timing": ("floor", "multisite")}


def fixed_sequence(folder: Path, wait_s: float) -> Path:
    """The demo sequence with its adaptive settling replaced by a fixed wait."""
    data = yaml.safe_load(DEMO_SEQUENCE.read_text(encoding="utf-8"))
    data["settle"] = {"wait": f"{wait_s * 1e3:g} ms"}
    for test in data["tests"]:
        test.pop("settle", None)
        if "applications" in test:  # relative to the demo sequence, which stays where it is
            test["applications"] = str(DEMO_SEQUENCE.parent / test["applications"])
    path = folder / "px401_fixed.yaml"
    path.write_text("# Demo sequence with a fixed worst-case settling wait (benchmark).\n"
                    + yaml.safe_dump(data, sort_keys=False), encoding="utf-8")
    return path


def steady_floor_ratio(run: LotRun, sequence_path: Path) -> tuple[float, float, float]:
    """(test time / floor, test time per part, floor per part) over the indexes after the
    first (the first one also measures the DMM noise, once per lot)."""
    sequence = load_sequence(sequence_path)
    truth = truth_parts(run.folder / "sim_truth.csv")
    sites = int(run.parts["SITE_NUM"].max())
    ids = run.parts["PART_ID"].tolist()
    test = floor = 0.0
    counted = 0
    for k, index_s in enumerate(run.index_s):
        chunk = ids[k * sites:(k + 1) * sites]
        if k == 0 and len(run.index_s) > 1:
            continue
        test += index_s
        floor += index_floor(sequence, [truth[i] for i in chunk], FloorBench())
        counted += len(chunk)
    return test / floor, test / counted, floor / counted


def steady_per_part(run: LotRun) -> float:
    times = run.index_s[1:] if len(run.index_s) > 1 else run.index_s
    sites = int(run.parts["SITE_NUM"].max())
    return sum(times) / (len(times) * sites)


def floor(sizes: Sizes, work: Path, fixed_path: Path) -> dict:
    """1-site lots, adaptive and with the fixed worst-case wait: floor ratio, adaptive speedup."""
    base = SimSettings(seed=SEED, sites=1, parts=sizes.timing_parts, speed=sizes.timing_speed)
    adaptive, fixed = [], []
    for rep in range(sizes.repeats):
        adaptive.append(run_lot(base, DEMO_SEQUENCE, DEMO_LIMITS, work / f"adaptive{rep}",
                                separate_process=OWN_PROCESS))
        fixed.append(run_lot(base, fixed_path, DEMO_LIMITS, work / f"fixed{rep}",
                             separate_process=OWN_PROCESS))
    floors = [steady_floor_ratio(run, DEMO_SEQUENCE) for run in adaptive]
    fixed_floors = [steady_floor_ratio(run, fixed_path) for run in fixed]
    speedups = [steady_per_part(f) / steady_per_part(a) for a, f in zip(adaptive, fixed, strict=True)]
    return {
        "floor_ratio": _median(f[0] for f in floors),
        "floor_ratio_runs": [round(f[0], 3) for f in floors],
        "test_s_per_part": _median(f[1] for f in floors),
        "floor_s_per_part": _median(f[2] for f in floors),
        "fixed_test_s_per_part": _median(f[1] for f in fixed_floors),
        "adaptive_speedup": _median(speedups),
        "timeouts_per_part": _median(r.stats.timeouts / r.parts_count for r in adaptive),
        "station_cpu_ms_per_part_1_site": _median(1e3 * r.cpu_s / r.parts_count for r in adaptive),
        "groups_per_condition": _median(r.stats.readings / r.stats.conditions for r in adaptive),
    }


def multisite(sizes: Sizes, work: Path) -> dict:
    """1-site and 4-site lots of the same parts, and one 4-site lot with one DMM behind the scanner."""
    multi = SimSettings(seed=SEED, sites=4, parts=sizes.multisite_parts, speed=sizes.timing_speed)
    one = SimSettings(seed=SEED, sites=1, parts=sizes.multisite_parts, speed=sizes.timing_speed)
    ratios, scanner_ratios, four_floor, cpu_ms, cpu_pct = [], [], [], [], []
    pph: dict[str, float] = {}
    for rep in range(sizes.repeats):
        single = run_lot(one, DEMO_SEQUENCE, DEMO_LIMITS, work / f"one{rep}", separate_process=OWN_PROCESS)
        four = run_lot(multi, DEMO_SEQUENCE, DEMO_LIMITS, work / f"four{rep}", separate_process=OWN_PROCESS)
        ratios.append(four.parts_per_hour / single.parts_per_hour)
        four_floor.append(steady_floor_ratio(four, DEMO_SEQUENCE)[0])
        cpu_ms.append(1e3 * four.cpu_s / four.parts_count)
        cpu_pct.append(100.0 * four.cpu_s / sum(four.index_s))
        if rep == 0:
            scan = run_lot(SimSettings(seed=SEED, sites=4, parts=sizes.multisite_parts, speed=sizes.timing_speed,
                                       dmm_per_site=False), DEMO_SEQUENCE, DEMO_LIMITS, work / "scanner",
                           separate_process=OWN_PROCESS)
            scanner_ratios.append(scan.parts_per_hour / single.parts_per_hour)
            pph = {"1 site": single.parts_per_hour, "4 sites": four.parts_per_hour,
                   "4 sites, one DMM": scan.parts_per_hour}
    return {
        "floor_ratio_4_sites": _median(four_floor),
        "floor_ratio_4_sites_runs": [round(f, 3) for f in four_floor],
        "multisite_speedup_4": _median(ratios),
        "multisite_speedup_4_runs": [round(r, 3) for r in ratios],
        "multisite_speedup_4_single_dmm": _median(scanner_ratios),
        "parts_per_hour": pph,
        # The 4-site lots at speed 1, the bench in its own process: CPU of the station's
        # process (all threads) over the lot, per part and over the handler indexes' test time.
        "station_cpu_ms_per_part": _median(cpu_ms),
        "station_cpu_pct_of_test_time": _median(cpu_pct),
    }


def accuracy(sizes: Sizes, work: Path, fixed_path: Path) -> dict:
    sequence, table = load_sequence(DEMO_SEQUENCE), load_limit_table(DEMO_LIMITS)
    big = run_lot(SimSettings(seed=SEED, sites=4, parts=sizes.accuracy_parts, speed=sizes.accuracy_speed),
                  DEMO_SEQUENCE, DEMO_LIMITS, work / "accuracy")
    score = score_datalog(big.folder, sequence, table)
    small = run_lot(SimSettings(seed=SEED, sites=4, parts=sizes.compare_parts, speed=sizes.accuracy_speed),
                    fixed_path, DEMO_LIMITS, work / "accuracy_fixed")
    common = set(small.parts["PART_ID"])
    adaptive_common = score_datalog(big.folder, sequence, table, only=common)
    fixed_common = score_datalog(small.folder, load_sequence(fixed_path), table, only=common)
    return {
        "cmrr_rms_error_db": {"low": score.errors["cmrr_db_low"], "high": score.errors["cmrr_db_high"]},
        "misbin_rate": score.misbin_rate, "misbins": score.misbins, "escapes": score.escapes,
        "wrongly_binned": score.wrong,
        "accuracy_parts": score.parts, "rms_errors": score.errors,
        "rms_errors_adaptive_common": adaptive_common.errors, "rms_errors_fixed_common": fixed_common.errors,
        "compare_parts": len(common), "accuracy_datalog": str(big.folder),
    }


def overhead(sizes: Sizes, work: Path) -> dict:
    settings = SimSettings(seed=SEED, sites=4, parts=sizes.overhead_parts)
    ratios, link_ratios, per_tx, station_times, plain_times = [], [], [], [], []
    for rep in range(sizes.overhead_repeats):
        station_s, records, _ = station_on_ideal_bench(settings, DEMO_SEQUENCE, DEMO_LIMITS, work / f"ideal{rep}",
                                                       separate_process=OWN_PROCESS)
        plain_s = replay(settings, records, separate_process=OWN_PROCESS)
        link_s = replay_through_links(settings, records, separate_process=OWN_PROCESS)
        ratios.append(station_s / plain_s)
        link_ratios.append(link_s / plain_s)
        per_tx.append(1e3 * plain_s / len(records))
        station_times.append(station_s)
        plain_times.append(plain_s)
    # Scheduling noise on a small machine only adds time: the fastest station run over the
    # fastest replay shows the systematic part (a detail; the figure is the median ratio).
    return {"overhead_ratio": _median(ratios), "link_replay_ratio": _median(link_ratios),
            "overhead_ratio_range": f"{min(ratios):.2f} to {max(ratios):.2f} over {len(ratios)} runs",
            "overhead_ratio_fastest_runs": min(station_times) / min(plain_times),
            "replay_ms_per_transaction": _median(per_tx), "transactions": len(records)}


def datalog(sizes: Sizes, work: Path) -> dict:
    rates = [writer_rows_per_s(work / f"writer{rep}", sizes.writer_parts, DEMO_SEQUENCE)
             for rep in range(sizes.repeats)]
    return {"datalog_rows_per_s": _median(rates)}


def summary(sizes: Sizes, work: Path, source: Path) -> dict:
    try:
        rows = grow_datalog(source, work / "big", sizes.summary_rows)
        times = [summary_seconds(work / "big") for _ in range(sizes.repeats)]
    except ImportError as exc:  # the review summary is written concurrently
        return {"summary_1m_rows_s": None, "summary_missing": f"station.review.summary not usable: {exc}"}
    total = _median(t[0] for t in times)
    return {"summary_rows": rows, "summary_load_and_summarise_s": total,
            "summary_summarise_only_s": _median(t[1] for t in times),
            "summary_1m_rows_s": total * 1_000_000 / rows, **summary_peak_rss(work / "big")}


def soak(sizes: Sizes, work: Path) -> dict:
    """The station's RSS growth over a long lot, time-compressed to the limit: the ideal bench
    (no settling, no integration wait, no handler index time) and no deliberate waits, so
    10,000 parts take minutes; every part goes through the same readings, grading, PAT, lot
    control and datalog as on a real bench."""
    settings = ideal_settings(SimSettings(seed=SEED, sites=4, parts=sizes.soak_last))
    settings = dataclasses.replace(settings, log_commands=False)
    return soak_rss(settings, DEMO_SEQUENCE, DEMO_LIMITS, work / "soak", sizes.soak_first, sizes.soak_last,
                    sleep=lambda seconds: None)


def summary_source(sizes: Sizes, work: Path, accuracy_folder: str | None) -> Path:
    """The datalog the 1M-row summary repeats: the accuracy lot's, or (when that section is
    not run) a short lot of the same kind, at the same speed."""
    if accuracy_folder:
        return Path(accuracy_folder)
    settings = SimSettings(seed=SEED, sites=4, parts=min(sizes.accuracy_parts, 60), speed=sizes.accuracy_speed)
    return run_lot(settings, DEMO_SEQUENCE, DEMO_LIMITS, work / "summary_source").folder


def _median(values) -> float:
    values = [v for v in values if v is not None and not math.isnan(v)]
    return statistics.median(values) if values else math.nan


def _store_main(args: argparse.Namespace) -> dict:
    """`--store`: publish rate, SQL summary of a 10 M-row store, DuckDB summary of Parquet history."""
    from benchmarks.store_speed import store_figures

    quick = args.quick or args.smoke
    with tempfile.TemporaryDirectory(prefix="ampscreen-store-bench-") as temp:
        figures: dict = {"mode": "store quick" if quick else "store", "machine": machine_info()}
        figures.update(store_figures(Path(temp), ingest_parts=2_000 if quick else 20_000,
                                     store_rows=1_000_000 if quick else 10_000_000,
                                     parquet_rows=10_000_000 if quick else args.parquet_rows,
                                     repeats=1 if quick else 3))
    for key, value in figures.items():
        print(f"{key:40s} {value:.4g}" if isinstance(value, float) else f"{key:40s} {value}")
    if args.json:
        args.json.write_text(json.dumps(figures, indent=2, allow_nan=True), encoding="utf-8")
    return figures


def _sections(text: str) -> list[str]:
    chosen: list[str] = []
    for name in (part.strip() for part in text.split(",") if part.strip()):
        if name in ALIASES:
            chosen += ALIASES[name]
        elif name in SECTIONS:
            chosen.append(name)
        else:
            raise argparse.ArgumentTypeError(f"{name!r}: not a section (choose from {', '.join(SECTIONS)}, timing)")
    return chosen


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(prog="python -m benchmarks", description=__doc__)
    parser.add_argument("--quick", action="store_true", help="fewer parts and repetitions (under two minutes)")
    parser.add_argument("--smoke", action="store_true", help=argparse.SUPPRESS)  # tiny sizes, for the test suite
    parser.add_argument("--json", type=Path, help="also write the figures here as JSON")
    parser.add_argument("--store", action="store_true",
                        help="only the fleet-store figures (needs PostgreSQL; minutes; see benchmarks/README.md)")
    parser.add_argument("--parquet-rows", type=int, default=100_000_000,
                        help="with --store: result rows of the synthetic Parquet history")
    parser.add_argument("--only", type=_sections, metavar="SECTION[,SECTION...]",
                        help="run these sections only: " + ", ".join(SECTIONS) + " (timing = floor,multisite)")
    parser.add_argument("--repeats", type=int, help="repetitions of the timing lots (default: the mode's)")
    args = parser.parse_args(argv)
    if args.store:
        return _store_main(args)
    sizes = SIZES["smoke" if args.smoke else "quick" if args.quick else "full"]
    if args.repeats:
        sizes = dataclasses.replace(sizes, repeats=args.repeats)
    chosen = args.only or list(SECTIONS)
    with tempfile.TemporaryDirectory(prefix="ampscreen-bench-") as temp:
        work = Path(temp)
        wait = worst_case_wait(load_sequence(DEMO_SEQUENCE), make_population(SEED, 200), FloorBench())
        fixed_path = fixed_sequence(work, wait)
        figures: dict = {"mode": sizes.name, "machine": machine_info(), "sizes": sizes.as_dict(),
                         "fixed_wait_s": wait, "bench_in_own_process": OWN_PROCESS,
                         "only": ",".join(args.only) if args.only else None, "load": {}, "loaded_keys": []}
        runs = {
            "floor": lambda: floor(sizes, work, fixed_path),
            "multisite": lambda: multisite(sizes, work),
            "accuracy": lambda: accuracy(sizes, work, fixed_path),
            "overhead": lambda: overhead(sizes, work),
            "datalog": lambda: datalog(sizes, work),
            "summary": lambda: summary(sizes, work, summary_source(sizes, work, figures.get("accuracy_datalog"))),
            "soak": lambda: soak(sizes, work),
            "transports": lambda: transport_round_trips(sizes.round_trips),
        }
        for section in SECTIONS:
            if section not in chosen:
                continue
            with LoadWatch(section) as watch:
                found = runs[section]()
            figures.update(found)
            figures["load"][section] = watch.figures()
            if watch.loaded:
                figures["loaded_keys"] += [key for key in found if key in TARGETS]
        figures.pop("accuracy_datalog", None)
    print_report(figures)
    if args.json:
        args.json.write_text(json.dumps(figures, indent=2, allow_nan=True), encoding="utf-8")
    return figures


if __name__ == "__main__":
    main()
