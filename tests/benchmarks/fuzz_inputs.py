"""A longer fuzz campaign of the input loaders (run by hand; not collected by pytest).

Runs the properties of tests/test_fuzz.py (its ``prop_*`` functions and
strategies) with many random examples each, and prints per property how many
inputs were tried and how many broke the contract (an exception other than
the project's documented errors, or a report line that names no file),
grouped by signature (exception type, the innermost frame of the project's
code, the message).

    python tests/benchmarks/fuzz_inputs.py [EXAMPLES_PER_PROPERTY] [SEED]
"""

import importlib.util
import sys
import tempfile
import time
import traceback
import warnings
from collections import Counter
from pathlib import Path

from hypothesis import HealthCheck, given, seed, settings
from hypothesis import strategies as st

HERE = Path(__file__).resolve().parent
_spec = importlib.util.spec_from_file_location("fuzz_props", HERE.parent / "test_fuzz.py")
props = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(props)


def _signature(exc):
    frames = [f for f in traceback.extract_tb(exc.__traceback__)
              if "/tasks/" in f.filename or "/pipeline/" in f.filename]
    where = f"{Path(frames[-1].filename).name}:{frames[-1].lineno}" if frames else "?"
    return f"{type(exc).__name__} at {where}: {' '.join(str(exc).split())[:100]}"


def main():
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 500
    run_seed = int(sys.argv[2]) if len(sys.argv) > 2 else int(time.time())
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        counter = [0]

        def fresh(name):
            counter[0] += 1
            path = tmp / f"{name}{counter[0]}"
            path.mkdir()
            return path

        tiny = props.make_tiny(fresh("tiny"))
        cases = [
            ("--set texts", props.prop_set_text, (props.SET_TEXTS,), lambda: ()),
            ("TOML values at keys", props.prop_toml_edits, (props.VISIT_EDITS, props.PROFILE_EDITS),
             lambda: (tiny, fresh("toml"))),
            ("TOML files of any bytes", props.prop_toml_bytes, props.TOML_BYTES,
             lambda: (fresh("bytes"),)),
            ("raw files, byte damage", props.prop_raw_bytes, (st.data(),),
             lambda: (tiny, fresh("raw"))),
            ("raw files, header/array/HDU", props.prop_raw_hdus, (st.data(),),
             lambda: (tiny, fresh("hdu"))),
            ("reference files, byte damage", props.prop_reference_bytes, (st.data(),),
             lambda: (tiny, fresh("ref"))),
        ]
        total = broken = 0
        for name, prop, strategies, context in cases:
            tried, bad = [0], Counter()

            def attempt(drawn, prop=prop, context=context, tried=tried, bad=bad):
                tried[0] += 1
                try:
                    with warnings.catch_warnings():
                        warnings.simplefilter("ignore")
                        prop(*context(), *drawn)
                except AssertionError as exc:
                    bad[f"contract broken: {' '.join(str(exc).split())[:120]}"] += 1
                except Exception as exc:    # noqa: BLE001  what the campaign counts
                    bad[_signature(exc)] += 1

            drawing = strategies[0] if len(strategies) == 1 and repr(strategies[0]) == "data()" \
                else None
            strategy = st.data() if drawing is not None else st.tuples(*strategies)

            @seed(run_seed)
            @settings(max_examples=n, deadline=None, database=None,
                      suppress_health_check=list(HealthCheck))
            @given(strategy)
            def run(value):
                attempt((value,) if drawing is not None else value)

            started = time.time()
            run()
            total += tried[0]
            broken += sum(bad.values())
            print(f"{name:<30} {tried[0]:>6} inputs {sum(bad.values()):>5} broke the contract "
                  f"({time.time() - started:.0f} s)", flush=True)
            for sig, count in bad.most_common():
                print(f"    {count:>5} x {sig}", flush=True)
        print(f"total: {total} inputs, {broken} broke the contract (seed {run_seed})")


if __name__ == "__main__":
    main()
