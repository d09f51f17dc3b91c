"""Calibration of the error estimates, run by hand:  python tests/calibration.py [--quick]

For every method, over the corpus of calibration_corpus.py (exact gradients at 40
digits), prints the coordinates measured, the fraction where |numeric - exact| <=
error_estimate (the promise is at least 99.9%), the false alarms (verdicts other
than 'agree', though the gradient given is exact), the worst misses, the cases
with most misses, and the time taken.

Options:  --quick (the CI subset)   --worst N (misses shown, default 5)
          --method NAME (one method only; repeatable)
"""
import argparse
import time

import calibration_corpus as corpus  # tests/ is on sys.path when run as a script

PROMISE = 0.999


def print_method(result, worst):
    r = result
    frac = r["fraction"]
    mark = "ok" if frac >= PROMISE else "BELOW 99.9%"
    print(f"== {r['method']}: {r['covered']} of {r['total']} coordinates covered "
          f"({100 * frac:.2f}%, {mark}); {r['miss_count']} misses; "
          f"{r['false_alarms']} false alarms; {r['seconds']:.1f} s")
    print(f"   verdicts: {dict(sorted(r['verdicts'].items()))}"
          + (f"; skipped (not complex-safe): {r['skipped']}" if r["skipped"] else "")
          + (f"; auto chose: {r['chosen']}" if r["method"] == "auto" else ""))
    if r["misses"]:
        print("   worst misses (ratio = |numeric - exact| / error_estimate):")
        for m in r["misses"][:worst]:
            print(f"     {m.name} [{m.coordinate}]  |err| {m.error:.3g}  estimate "
                  f"{m.estimate:.3g}  ratio {m.ratio:.3g}  ({m.verdict})")
        common = ", ".join(f"{name} ({k})" for name, k in r["miss_cases"].most_common(5))
        print(f"   cases with most misses: {common}")
    if r["false_alarms"]:
        alarms = {}
        for name, _, verdict in r["alarms"]:
            alarms[(name, verdict)] = alarms.get((name, verdict), 0) + 1
        top = sorted(alarms.items(), key=lambda kv: -kv[1])[:5]
        print("   cases with most false alarms: "
              + ", ".join(f"{name} {verdict} ({k})" for (name, verdict), k in top))


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--worst", type=int, default=5)
    parser.add_argument("--method", action="append", choices=corpus.METHODS)
    args = parser.parse_args(argv)
    start = time.perf_counter()
    built = list(corpus.cases(args.quick))
    build = time.perf_counter() - start
    families = {}
    for case in built:
        families[case.family] = families.get(case.family, 0) + case.size
    print(f"corpus ({'quick' if args.quick else 'full'}): {len(built)} cases, "
          f"{sum(c.size for c in built)} coordinates {families}; built in {build:.1f} s")
    for method in args.method or corpus.METHODS:
        print_method(corpus.coverage(method, quick=args.quick, worst=args.worst), args.worst)
    print(f"total time {time.perf_counter() - start:.1f} s")


if __name__ == "__main__":
    main()
