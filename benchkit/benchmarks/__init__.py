"""The project's benchmarks, run by one command: `python -m benchkit.benchmarks --out DIR`.

Each benchmark measures a ratio within one run, or a time beside its baseline, so a slow
machine changes the times but not what they are compared against:

- bench_time: bench seconds of a uniform sweep against settle detection plus adaptive steps,
  on the simulated bench with a virtual clock, and how close each fitted curve comes to the
  bench's true settled curve (bench_time.py);
- overhead: the engine's wall time per measured point against a bare pyvisa query round trip
  to the same simulated meter (overhead.py);
- fits: fits per second of fits.fit_sweep against a bare scipy.optimize.curve_fit of the
  same model on the same 41-point sweep, and milliseconds per "auto" choice (fit_speed.py);
- strd: matched digits of the fitting engine on the NIST StRD nonlinear regression
  datasets (strd.py);
- independent_truths: auto fits on shapes none of the models is: worst error and band
  coverage (independent_truths.py);
- library_query: the curve library's vectorised query over many curves
  (benchkit.library.benchmark_query).

Nothing here is a test: no time is asserted anywhere. Results go to bench.json (with the git
commit, the machine and the date) and a readable table to stdout and bench.txt.
"""

from benchkit.benchmarks.runner import BENCHMARKS, run_all

__all__ = ["BENCHMARKS", "run_all"]
