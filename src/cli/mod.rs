//! Argument parsing and the subcommands (binary-only code; the work is in the library).

use std::io::Write as _;
use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::{bail, Context as _};
use clap::{Parser, Subcommand, ValueEnum};
use posconform::bench::BenchShape;
use posconform::case::OperationKind;
use posconform::compare::CompareOptions;
use posconform::math::Dtype;
use posconform::report::{self, write_atomic, Report, EXIT_COULD_NOT_RUN};
use posconform::select::{Filter, IdPattern, Part, Selection};
use posconform::suite::{suite, SUITES};
use posconform::Scheme;

/// Checks that an attention kernel implements positional encoding correctly, and says
/// what is wrong when it does not.
#[derive(Debug, Parser)]
#[command(name = "posconform", version, about, long_about = None)]
#[command(
    after_help = "Exit status: 0 conforming, 1 nonconforming, 2 could not run.\n\
Conventions: docs/conventions.md; kernel protocol: docs/protocol.md; fault catalogue:\n\
docs/faults.md (or `posconform explain`); budgets: docs/budgets.md; vector format:\n\
vectors/README.md."
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Subcommand)]
enum Command {
    /// List schemes, suites, or the cases of one suite.
    List {
        /// Show the cases of this suite.
        #[arg(long)]
        suite: Option<String>,
    },
    /// Write a suite's golden vectors (inputs, expected outputs, budgets) to a directory.
    Emit {
        /// Suite to write: core (small, committed) or long (large, generated on demand).
        #[arg(long, default_value = "core")]
        suite: String,
        /// Directory to write into. Only files an earlier emit listed in DIR/index.json
        /// are replaced or removed; any other file in the way is an error.
        #[arg(long)]
        out: PathBuf,
        /// Budget factor c (finite, >= 1): a kernel may make c times the same-precision
        /// baseline's error.
        #[arg(long, default_value_t = 2.0)]
        factor: f64,
    },
    /// Compare a kernel's result files with golden vectors, offline.
    Verify(VerifyArgs),
    /// Drive a live kernel over the stdio protocol: the suite, then random cases, with
    /// each failure shrunk to a minimal case.
    Check(CheckArgs),
    /// Run the bundled demo: a fictional team's kernel with a positional bug that only
    /// shows beyond the first segment, checked through the real protocol path.
    Demo {
        /// Random cases after the suite.
        #[arg(long, default_value_t = 200)]
        fuzz: usize,
        /// Seed of the fuzzer.
        #[arg(long, default_value_t = 7)]
        seed: u64,
    },
    /// Explain a catalogued fault: the mistake, how it arises, which cases expose it, a
    /// worked example and the fix. Without an id, list the catalogue.
    Explain {
        /// The fault's id, as reports name it (e.g. mask-not-offset-by-memory).
        fault: Option<String>,
    },
    /// Self-test of the suite's power: plant every catalogued fault in an otherwise
    /// correct kernel, check it with the suite and a fixed fuzz budget, and print what
    /// caught each fault and what the diagnosis named. Exit 1 if a fault goes uncaught
    /// or fewer than 90% are named first.
    Plant(PlantArgs),
    /// Time named workloads (scheme/operation/shape/dtype) of the reference or of a
    /// kernel, as ratios to calibration workloads run in the same process; with
    /// --baseline, gate on regressions the noise supports (docs/bench.md).
    #[command(
        after_help = "Exit status: 0 no regression the noise supports, 1 a regression beyond its\n\
threshold, 2 could not run (bad input, a workload that could not be timed).\n\
JSON document, ratios and the gate: docs/bench.md."
    )]
    Bench(BenchArgs),
    /// Serve the demo kernel over the protocol on stdin/stdout (used by `demo`).
    #[command(name = "__demo-kernel", hide = true)]
    DemoKernel,
    /// Serve the reference over the protocol on stdin/stdout (a conforming kernel for
    /// testing a setup end to end).
    #[command(name = "__reference-kernel", hide = true)]
    ReferenceKernel {
        /// Take this many times as long over every run: after computing, spin until
        /// the run has taken FACTOR times the computation's own time (tests only: a
        /// planted slowdown for the bench gate).
        #[arg(long, value_name = "FACTOR", default_value_t = 1.0, hide = true)]
        slowdown: f64,
    },
}

#[derive(Debug, clap::Args)]
struct BenchArgs {
    /// The kernel's command line, run without a shell; without it, the library's own
    /// reference operations are timed, in process.
    #[arg(long)]
    kernel: Option<String>,
    /// Shapes: small, medium, large, or L<L>_M<M>_d<d>_h<H> such as L512_M512_d64_h8
    /// (comma-separated or repeated; default medium = L128_M128_d64_h4).
    #[arg(long, value_name = "SHAPE", value_delimiter = ',')]
    shape: Vec<BenchShape>,
    /// Only workloads of these schemes (comma-separated or repeated).
    #[arg(long, value_name = "SCHEME", value_delimiter = ',')]
    scheme: Vec<Scheme>,
    /// Only workloads of these operations.
    #[arg(long, value_name = "OPERATION", value_delimiter = ',')]
    operation: Vec<OperationKind>,
    /// Only workloads in these dtypes (the reference computes in f64).
    #[arg(long, value_name = "DTYPE", value_delimiter = ',')]
    dtype: Vec<Dtype>,
    /// Only workloads whose name matches this pattern (`*` any characters, `?` one;
    /// repeated: any may match), e.g. 'rotary/*/f32'.
    #[arg(long, value_name = "PATTERN")]
    workload: Vec<IdPattern>,
    /// Untimed runs of each workload first.
    #[arg(long, value_name = "N", default_value_t = 3)]
    warmup: usize,
    /// Timed runs of each workload (at least 5).
    #[arg(long, value_name = "N", default_value_t = 15)]
    repeat: usize,
    /// Blocks the timed runs are shared out over, every workload taking its turn in
    /// each; the spread of the blocks' floors is the noise the gate judges by (from 2 to
    /// --repeat).
    #[arg(long, value_name = "N", default_value_t = posconform::bench::DEFAULT_BLOCKS)]
    blocks: usize,
    /// Seconds the kernel may take to read one request and answer it.
    #[arg(long, default_value_t = 30.0)]
    timeout: f64,
    /// Append the kernel's stderr to this file.
    #[arg(long, value_name = "FILE")]
    kernel_log: Option<PathBuf>,
    /// The JSON document of an earlier run (--format json or --json) to gate against.
    #[arg(long, value_name = "FILE")]
    baseline: Option<PathBuf>,
    /// Slowdown of a workload's ratio that fails the gate when the noise supports it: a
    /// fraction or a percentage.
    #[arg(long, value_name = "FRACTION", default_value = "25%")]
    threshold: String,
    /// Another threshold for the workloads whose name matches PATTERN (repeated; the
    /// first match wins), e.g. 'xl_relative/*=40%'.
    #[arg(long, value_name = "PATTERN=FRACTION")]
    threshold_for: Vec<String>,
    /// Report format on standard output.
    #[arg(long, value_enum, default_value_t = Format::Text)]
    format: Format,
    /// Also write the JSON document to this file (the next run's baseline).
    #[arg(long, value_name = "FILE")]
    json: Option<PathBuf>,
    /// No progress display.
    #[arg(long)]
    quiet: bool,
}

#[derive(Debug, clap::Args)]
struct CheckArgs {
    /// The kernel's command line, run without a shell (quote arguments with spaces).
    #[arg(long)]
    kernel: String,
    /// Suite to run first.
    #[arg(long, default_value = "core")]
    suite: String,
    /// Run only the cases of these vector files (for example a saved minimal case)
    /// instead of the suite; fuzzing is off unless --fuzz is given.
    #[arg(long, value_name = "FILE")]
    case: Vec<PathBuf>,
    /// Random cases after the suite (default 200; 0 turns fuzzing off).
    #[arg(long)]
    fuzz: Option<usize>,
    /// Stop fuzzing after this many seconds (0 to 604800).
    #[arg(long, value_name = "SECONDS")]
    fuzz_time: Option<f64>,
    /// Seed of the fuzzer; the same seed gives the same cases.
    #[arg(long, default_value_t = 0x5eed)]
    seed: u64,
    /// Seconds the kernel may take to read one request and answer it (more than 0, at
    /// most 604800). On a timeout the kernel and every process it started are stopped.
    #[arg(long, default_value_t = 30.0)]
    timeout: f64,
    /// Directory where minimal failing cases are saved as vector files.
    #[arg(long, value_name = "DIR", default_value = "posconform-failures")]
    save_failures: PathBuf,
    /// Append the kernel's stderr to this file (an error if it cannot be written).
    #[arg(long, value_name = "FILE")]
    kernel_log: Option<PathBuf>,
    /// Record every protocol line sent and received in this file.
    #[arg(long, value_name = "FILE")]
    trace: Option<PathBuf>,
    /// No progress display.
    #[arg(long)]
    quiet: bool,
    #[command(flatten)]
    select: SelectArgs,
    #[command(flatten)]
    output: OutputArgs,
}

#[derive(Debug, clap::Args)]
struct PlantArgs {
    /// Suite each planted kernel is checked with.
    #[arg(long, default_value = "core")]
    suite: String,
    /// Random cases per planted fault after the suite.
    #[arg(long, default_value_t = PLANT_FUZZ)]
    fuzz: usize,
    /// Seed of the fuzzer.
    #[arg(long, default_value_t = 0x5eed)]
    seed: u64,
    /// Plant only these faults (repeatable; default every catalogued fault).
    #[arg(long, value_name = "ID")]
    fault: Vec<String>,
    /// Output: a table (text), JSON, or the catalogue page with the table (markdown,
    /// as in docs/faults.md).
    #[arg(long, value_enum, default_value_t = PlantFormat::Text)]
    format: PlantFormat,
    /// Write the output to this file instead of standard output.
    #[arg(long, value_name = "FILE")]
    out: Option<PathBuf>,
    /// No progress display.
    #[arg(long)]
    quiet: bool,
}

/// Random cases per planted fault in `posconform plant` (and docs/faults.md).
const PLANT_FUZZ: usize = posconform::run::plant::DEFAULT_FUZZ;

#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
enum PlantFormat {
    /// A table for people.
    Text,
    /// One JSON document.
    Json,
    /// The docs page: the catalogue and the table.
    Markdown,
}

#[derive(Debug, clap::Args)]
struct VerifyArgs {
    /// Directory of vector files (from `posconform emit`).
    #[arg(long)]
    vectors: PathBuf,
    /// Directory of the kernel's result files: <case>.json or <case>.<output>.npy.
    #[arg(long)]
    results: PathBuf,
    #[command(flatten)]
    select: SelectArgs,
    #[command(flatten)]
    output: OutputArgs,
}

/// Which cases to run, shared by `check` and `verify`: filters, then one part of N.
#[derive(Debug, clap::Args)]
#[command(next_help_heading = "Selecting cases")]
struct SelectArgs {
    /// Only cases of these schemes (comma-separated or repeated).
    #[arg(long, value_name = "SCHEME", value_delimiter = ',')]
    scheme: Vec<Scheme>,
    /// Only cases of these operations: encode, scores, attention, stream, decode.
    #[arg(long, value_name = "OPERATION", value_delimiter = ',')]
    operation: Vec<OperationKind>,
    /// Only cases written for these dtypes (the case's own dtype).
    #[arg(long, value_name = "DTYPE", value_delimiter = ',')]
    dtype: Vec<Dtype>,
    /// Only cases whose id matches this pattern (`*` any characters, `?` one; quote it;
    /// repeated: any may match). Random cases are drawn from the schemes, operations and
    /// dtypes the other filters keep.
    #[arg(long, value_name = "PATTERN")]
    id: Vec<IdPattern>,
    /// Run part I of N (1 <= I <= N): N runs with parts 1/N to N/N together cover every
    /// selected case exactly once, and split the random cases of one seed by index.
    #[arg(long, value_name = "I/N")]
    part: Option<Part>,
}

impl SelectArgs {
    fn selection(&self) -> Selection {
        Selection {
            filter: Filter {
                schemes: self.scheme.clone(),
                operations: self.operation.clone(),
                dtypes: self.dtype.clone(),
                ids: self.id.clone(),
            },
            part: self.part.unwrap_or_default(),
        }
    }
}

/// Report options shared by `verify` and `check`.
#[derive(Debug, clap::Args)]
struct OutputArgs {
    /// Report format on standard output.
    #[arg(long, value_enum, default_value_t = Format::Text)]
    format: Format,
    /// Also write a JUnit XML report to this file.
    #[arg(long, value_name = "FILE")]
    junit: Option<PathBuf>,
    /// Also write the JSON report to this file.
    #[arg(long, value_name = "FILE")]
    json: Option<PathBuf>,
    /// Write an SVG heatmap of the error per head for each failing scores or
    /// probabilities output into this directory.
    #[arg(long, value_name = "DIR")]
    svg: Option<PathBuf>,
    /// Budget factor c (finite, >= 1) against the same-precision baseline.
    #[arg(long, default_value_t = 2.0)]
    factor: f64,
    /// Derive budgets for this dtype instead of the one the kernel declares (a looser
    /// dtype is flagged in the report).
    #[arg(long, value_name = "DTYPE")]
    budget_dtype: Option<Dtype>,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
enum Format {
    /// Table and findings for people.
    Text,
    /// One JSON document.
    Json,
}

impl std::str::FromStr for Format {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        <Format as ValueEnum>::from_str(s, true)
    }
}

/// Parses, runs, and maps the outcome to an exit code; errors print with their causes.
pub fn run() -> ExitCode {
    let cli = Cli::parse();
    // Listings piped into `head` and the like: a reader that stops early is no error.
    let listing = matches!(cli.command, Command::List { .. } | Command::Explain { .. });
    match dispatch(cli.command) {
        Ok(code) => ExitCode::from(code),
        Err(e)
            if listing
                && e.chain().any(|c| {
                    c.downcast_ref::<std::io::Error>()
                        .is_some_and(|io| io.kind() == std::io::ErrorKind::BrokenPipe)
                }) =>
        {
            ExitCode::SUCCESS
        }
        Err(e) => {
            eprintln!("posconform: error: {e:#}");
            ExitCode::from(EXIT_COULD_NOT_RUN)
        }
    }
}

fn dispatch(command: Command) -> anyhow::Result<u8> {
    match command {
        Command::List { suite: name } => list(name.as_deref()),
        Command::Emit {
            suite: name,
            out,
            factor,
        } => emit(&name, &out, factor),
        Command::Verify(args) => {
            let options = compare_options(&args.output)?;
            check_report_paths(&args.output)?;
            let report = posconform::verify::verify_selected(
                &args.vectors,
                &args.results,
                &options,
                &args.select.selection(),
            )?;
            finish(&report, &args.output, "")
        }
        Command::Check(args) => check(args),
        Command::Demo { fuzz, seed } => demo(fuzz, seed),
        Command::Explain { fault } => explain(fault.as_deref()),
        Command::Plant(args) => plant(args),
        Command::DemoKernel => serve(&mut posconform::demo::TernKernel),
        Command::ReferenceKernel { slowdown } => serve(&mut Slowed {
            kernel: posconform::kernel::ReferenceKernel::default(),
            factor: if slowdown.is_finite() && (1.0..=1000.0).contains(&slowdown) {
                slowdown
            } else {
                bail!("--slowdown must be a number from 1 to 1000, given {slowdown}")
            },
        }),
        Command::Bench(args) => bench(args),
    }
}

/// A kernel that computes every case `times` times and answers the last result: the
/// same answers, `times` times the work (tests plant a slowdown with it).
/// A kernel taking `factor` times as long as `kernel`: a slowdown by a known factor,
/// whatever caches and threads make of repeated work (running the computation twice
/// took only 1.15 to 1.7 times as long at small shapes: the second run is warm).
struct Slowed<K> {
    kernel: K,
    factor: f64,
}

impl<K: posconform::kernel::Kernel> posconform::kernel::Kernel for Slowed<K> {
    fn describe(&mut self) -> posconform::Result<posconform::kernel::KernelInfo> {
        self.kernel.describe()
    }

    fn run(
        &mut self,
        case: &posconform::Case,
        dtype: Dtype,
        inputs: &posconform::case::Arrays,
    ) -> posconform::Result<posconform::kernel::Answer> {
        let started = std::time::Instant::now();
        let answer = self.kernel.run(case, dtype, inputs)?;
        let until = started.elapsed().mul_f64(self.factor);
        while started.elapsed() < until {
            std::hint::spin_loop();
        }
        Ok(answer)
    }
}

fn serve(kernel: &mut dyn posconform::kernel::Kernel) -> anyhow::Result<u8> {
    let (stdin, stdout) = (std::io::stdin().lock(), std::io::stdout().lock());
    posconform::kernel::protocol::serve(kernel, stdin, stdout)?;
    Ok(0)
}

/// The longest time option accepted: one week.
const MAX_SECONDS: f64 = 604_800.0;

/// A time option in seconds: finite, from 0 (or more than 0) to [`MAX_SECONDS`].
fn seconds(option: &str, value: f64, zero_allowed: bool) -> anyhow::Result<std::time::Duration> {
    let low_ok = if zero_allowed {
        value >= 0.0
    } else {
        value > 0.0
    };
    if !(value.is_finite() && low_ok && value <= MAX_SECONDS) {
        let low = if zero_allowed {
            "from 0"
        } else {
            "more than 0"
        };
        bail!(
            "{option} must be a number of seconds {low} to {MAX_SECONDS} (one week), given {value}"
        );
    }
    std::time::Duration::try_from_secs_f64(value)
        .with_context(|| format!("{option}: {value} seconds"))
}

fn factor_ok(factor: f64) -> anyhow::Result<()> {
    if !(factor.is_finite() && factor >= 1.0) {
        bail!("--factor must be a finite number >= 1, given {factor}");
    }
    Ok(())
}

/// Report files and directories are checked before the run, so a bad path costs
/// nothing: no report is lost to it and the exit code still tells the verdict.
fn check_report_paths(args: &OutputArgs) -> anyhow::Result<()> {
    for (option, path) in [("--json", &args.json), ("--junit", &args.junit)] {
        if let Some(path) = path {
            posconform::files::check_output_file(path)
                .with_context(|| format!("{option} {}", path.display()))?;
        }
    }
    if let Some(dir) = &args.svg {
        posconform::files::check_output_dir(dir)
            .with_context(|| format!("--svg {}", dir.display()))?;
    }
    Ok(())
}

/// Installs the handler that stops the kernels when posconform gets SIGINT, SIGTERM or
/// SIGHUP: the first signal is forwarded to them (the run then ends with the results
/// it has), a second one kills them and exits at once.
#[cfg(unix)]
fn forward_signals() -> anyhow::Result<()> {
    use signal_hook::consts::{SIGHUP, SIGINT, SIGTERM};
    let mut signals = signal_hook::iterator::Signals::new([SIGINT, SIGTERM, SIGHUP])
        .context("installing the signal handler")?;
    std::thread::spawn(move || {
        let mut first = true;
        for signal in signals.forever() {
            if first {
                first = false;
                eprintln!(
                    "posconform: signal {signal}: stopping the kernel (send it again to quit at once)"
                );
                std::thread::spawn(move || posconform::kernel::stdio::interrupt(signal));
            } else {
                posconform::kernel::stdio::kill_all_now();
                std::process::exit(i32::from(EXIT_COULD_NOT_RUN));
            }
        }
    });
    Ok(())
}

#[cfg(not(unix))]
fn forward_signals() -> anyhow::Result<()> {
    Ok(())
}

fn check(args: CheckArgs) -> anyhow::Result<u8> {
    let compare = compare_options(&args.output)?;
    let timeout = seconds("--timeout", args.timeout, false)?;
    let fuzz_time = match args.fuzz_time {
        Some(t) => Some(seconds("--fuzz-time", t, true)?),
        None => None,
    };
    check_report_paths(&args.output)?;
    posconform::files::check_output_dir(&args.save_failures)
        .with_context(|| format!("--save-failures {}", args.save_failures.display()))?;
    let cases = if args.case.is_empty() {
        suite(&args.suite)?
    } else {
        args.case
            .iter()
            .map(|p| posconform::vector::VectorFile::read_case(p))
            .collect::<Result<Vec<_>, _>>()?
    };
    let fuzz_cases = args
        .fuzz
        .unwrap_or(if args.case.is_empty() { 200 } else { 0 });
    let argv = posconform::kernel::stdio::split_command(&args.kernel)?;
    let mut kernel = posconform::kernel::stdio::StdioKernel::new(argv, timeout);
    if let Some(log) = &args.kernel_log {
        kernel = kernel
            .with_log(log)
            .with_context(|| format!("--kernel-log {}", log.display()))?;
    }
    if let Some(trace) = &args.trace {
        kernel = kernel
            .with_trace(trace)
            .with_context(|| format!("--trace {}", trace.display()))?;
    }
    let options = posconform::check::CheckOptions {
        compare,
        fuzz_cases,
        fuzz_time,
        seed: args.seed,
        save_dir: Some(args.save_failures.clone()),
        select: args.select.selection(),
        ..Default::default()
    };
    forward_signals()?;
    let mut outcome = run_check(&mut kernel, &cases, &options, args.quiet)?;
    // The kernel (and whatever it started) is stopped before the reports are written.
    let log_problem = kernel.log_problem();
    drop(kernel);
    if let Some(problem) = &log_problem {
        outcome
            .report
            .notes
            .push(format!("the kernel log is incomplete: {problem}"));
    }
    let extra = report::text::render_minimal(&outcome.minimal);
    let code = finish(&outcome.report, &args.output, &extra)?;
    if let Some(problem) = log_problem {
        eprintln!("posconform: error: the kernel log is incomplete: {problem}");
        return Ok(code.max(EXIT_COULD_NOT_RUN));
    }
    Ok(code)
}

/// A progress bar on stderr when it is a terminal (and not `quiet`); nothing is drawn
/// for runs that finish within a second.
fn progress_bar(quiet: bool) -> indicatif::ProgressBar {
    use std::io::IsTerminal as _;
    if quiet || !std::io::stderr().is_terminal() {
        return indicatif::ProgressBar::hidden();
    }
    let bar = indicatif::ProgressBar::new(0);
    if let Ok(style) =
        indicatif::ProgressStyle::with_template("{prefix:>7} [{bar:30}] {pos}/{len} {elapsed}")
    {
        bar.set_style(style.progress_chars("=> "));
    }
    bar
}

fn bench(args: BenchArgs) -> anyhow::Result<u8> {
    use posconform::bench::{self, gate, render, BenchOptions, Target};
    if !(5..=100_000).contains(&args.repeat) {
        bail!("--repeat must be from 5 to 100000, given {}", args.repeat);
    }
    if !(2..=args.repeat).contains(&args.blocks) {
        bail!(
            "--blocks must be from 2 to --repeat ({}), given {}",
            args.repeat,
            args.blocks
        );
    }
    if args.warmup > 10_000 {
        bail!("--warmup must be at most 10000, given {}", args.warmup);
    }
    let timeout = seconds("--timeout", args.timeout, false)?;
    let thresholds = gate::Thresholds {
        default: gate::parse_threshold(&args.threshold).context("--threshold")?,
        overrides: args
            .threshold_for
            .iter()
            .map(|text| {
                gate::parse_override(text).with_context(|| format!("--threshold-for {text}"))
            })
            .collect::<anyhow::Result<_>>()?,
    };
    if let Some(path) = &args.json {
        posconform::files::check_output_file(path)
            .with_context(|| format!("--json {}", path.display()))?;
    }
    // A bad baseline costs nothing: it is read before anything is timed.
    let baseline = match &args.baseline {
        Some(path) => Some(gate::Baseline::read(path).context("--baseline")?),
        None => None,
    };
    let shapes = if args.shape.is_empty() {
        vec![BenchShape::preset("medium").context("the medium preset")?]
    } else {
        args.shape.clone()
    };
    let filter = Filter {
        schemes: args.scheme.clone(),
        operations: args.operation.clone(),
        dtypes: args.dtype.clone(),
        ids: args.workload.clone(),
    };
    let options = BenchOptions {
        warmup: args.warmup,
        repeat: args.repeat,
        blocks: args.blocks,
    };
    let bar = progress_bar(args.quiet);
    let started = std::time::Instant::now();
    let mut progress = |done: usize, total: usize| {
        if started.elapsed() < std::time::Duration::from_secs(1) {
            return;
        }
        bar.set_prefix("bench");
        bar.set_length(total as u64);
        bar.set_position(done as u64);
    };
    let report = match &args.kernel {
        None => {
            let workloads = bench::reference_workloads(&shapes, &filter)?;
            let subject = format!("posconform {}", env!("CARGO_PKG_VERSION"));
            bench::measure(
                Target::Reference,
                subject,
                workloads,
                &options,
                &mut progress,
            )
        }
        Some(command) => {
            let argv = posconform::kernel::stdio::split_command(command)?;
            let mut kernel = posconform::kernel::stdio::StdioKernel::new(argv, timeout);
            if let Some(log) = &args.kernel_log {
                kernel = kernel
                    .with_log(log)
                    .with_context(|| format!("--kernel-log {}", log.display()))?;
            }
            forward_signals()?;
            let info = posconform::Kernel::describe(&mut kernel)?;
            let (workloads, notes) = bench::kernel_workloads(&info, &shapes, &filter)?;
            let subject = format!("{} {}", info.name, info.version).trim().to_string();
            let mut report = bench::measure(
                Target::Kernel(&mut kernel),
                subject,
                workloads,
                &options,
                &mut progress,
            );
            report.notes.splice(0..0, notes);
            if let Some(problem) = kernel.log_problem() {
                report
                    .notes
                    .push(format!("the kernel log is incomplete: {problem}"));
            }
            report
        }
    };
    bar.finish_and_clear();
    let gate = baseline.map(|b| gate::compare(&report, &b, &thresholds));
    let json = render::json(&report, gate.as_ref());
    if let Some(path) = &args.json {
        write_atomic(path, json.as_bytes())?;
    }
    let text = match args.format {
        Format::Text => render::text(&report, gate.as_ref()),
        Format::Json => json,
    };
    let _ = std::io::stdout().lock().write_all(text.as_bytes());
    Ok(render::exit_code(&report, gate.as_ref()))
}

fn run_check(
    kernel: &mut dyn posconform::kernel::Kernel,
    cases: &[posconform::case::Case],
    options: &posconform::check::CheckOptions,
    quiet: bool,
) -> anyhow::Result<posconform::check::CheckOutcome> {
    let bar = progress_bar(quiet);
    let started = std::time::Instant::now();
    let mut progress = |phase: &str, done: usize, total: usize| {
        // Nothing is drawn for runs that finish within a second.
        if started.elapsed() < std::time::Duration::from_secs(1) {
            return;
        }
        bar.set_prefix(phase.to_string());
        bar.set_length(total as u64);
        bar.set_position(done as u64);
    };
    let outcome = posconform::check::check(kernel, cases, options, &mut progress);
    bar.finish_and_clear();
    Ok(outcome?)
}

fn demo(fuzz: usize, seed: u64) -> anyhow::Result<u8> {
    let exe = std::env::current_exe()
        .context("finding the posconform executable to start the demo kernel")?;
    // A fresh private directory (unpredictable name, owner-only) for the minimal
    // failing cases, kept after the run so the printed replay commands work.
    let save = tempfile::Builder::new()
        .prefix("posconform-demo-")
        .tempdir()
        .context("creating a private temporary directory for the demo's failing cases")?
        .keep();
    println!(
        "Demo: Brightwater Audio (a fictional team) is porting Kestrel-XL, a streaming captioning\n\
         model with Transformer-XL relative attention and segment memory, to their Tern runtime.\n\
         Their fused kernel passed every single-segment test they wrote. posconform starts it as a\n\
         child process and checks it over the stdio protocol, exactly as it would check yours.\n"
    );
    let argv = vec![exe.display().to_string(), "__demo-kernel".to_string()];
    let mut kernel =
        posconform::kernel::stdio::StdioKernel::new(argv, std::time::Duration::from_secs(30));
    let options = posconform::check::CheckOptions {
        fuzz_cases: fuzz,
        seed,
        save_dir: Some(save),
        ..Default::default()
    };
    forward_signals()?;
    let outcome = run_check(&mut kernel, &suite("core")?, &options, false)?;
    drop(kernel);
    let mut out = std::io::stdout().lock();
    out.write_all(report::text::render(&outcome.report).as_bytes())?;
    out.write_all(report::text::render_minimal(&outcome.minimal).as_bytes())?;
    let code = outcome.report.exit_code();
    writeln!(
        out,
        "\nWhat this shows: cases without memory (M = 0) pass and every case with memory fails; in the\n\
         stream the errors begin at the second segment, and the minimal case needs just one memory key.\n\
         The kernel's causal mask is not offset by the memory length M (`posconform explain\n\
         mask-not-offset-by-memory`): it lets query i see keys j <= i instead of j <= M + i.\n\
         A real `posconform check` would exit {code} here; the demo exits 0 because it found the\n\
         bug it was built to show."
    )?;
    Ok(if code == report::EXIT_NONCONFORMING {
        0
    } else {
        report::EXIT_COULD_NOT_RUN
    })
}

fn compare_options(args: &OutputArgs) -> anyhow::Result<CompareOptions> {
    factor_ok(args.factor)?;
    Ok(CompareOptions {
        factor: args.factor,
        budget_dtype: args.budget_dtype,
        ..CompareOptions::default()
    })
}

fn explain(id: Option<&str>) -> anyhow::Result<u8> {
    let mut out = std::io::stdout().lock();
    let Some(id) = id else {
        write!(out, "{}", report::explain::catalogue_text())?;
        return Ok(0);
    };
    let Some(fault) = posconform::diagnose::fault(id) else {
        let words: Vec<&str> = id.split(['-', '_', ' ']).filter(|w| w.len() > 2).collect();
        // The ids sharing the most words with the one asked for.
        let shared = |f: &str| words.iter().filter(|w| f.contains(*w)).count();
        let best = posconform::diagnose::catalogue()
            .iter()
            .map(|f| shared(f.id))
            .max()
            .unwrap_or(0);
        let near: Vec<&str> = posconform::diagnose::catalogue()
            .iter()
            .map(|f| f.id)
            .filter(|f| best > 0 && shared(f) == best)
            .take(4)
            .collect();
        let hint = if near.is_empty() {
            "run `posconform explain` for the list".to_string()
        } else {
            format!(
                "did you mean {}? (`posconform explain` lists all)",
                near.join(", ")
            )
        };
        bail!("no catalogued fault is called `{id}`: {hint}");
    };
    let cases = suite("core")?;
    let example = posconform::diagnose::example(fault, &cases, 6);
    let tagged: Vec<&str> = cases
        .iter()
        .filter(|c| c.faults.iter().any(|f| f == fault.id))
        .map(|c| c.id.as_str())
        .collect();
    write!(
        out,
        "{}",
        report::explain::explain_text(fault, example.as_ref(), &tagged)
    )?;
    Ok(0)
}

fn plant(args: PlantArgs) -> anyhow::Result<u8> {
    let cases = suite(&args.suite)?;
    for id in &args.fault {
        if posconform::diagnose::fault(id).is_none() {
            bail!(
                "--fault {id}: no catalogued fault has this id (`posconform explain` lists them)"
            );
        }
    }
    if let Some(path) = &args.out {
        posconform::files::check_output_file(path)
            .with_context(|| format!("--out {}", path.display()))?;
    }
    let show = !args.quiet && std::io::IsTerminal::is_terminal(&std::io::stderr());
    let mut progress = |done: usize, total: usize, id: &str| {
        if show {
            eprint!("\r\x1b[2Kplanting {done}/{total} {id}");
            if done == total {
                eprintln!();
            }
        }
    };
    let (text, results) = if args.format == PlantFormat::Markdown && args.fault.is_empty() {
        posconform::run::plant::catalogue_page(&args.suite, args.fuzz, args.seed, &mut progress)?
    } else {
        if args.format == PlantFormat::Markdown {
            bail!("--format markdown writes the whole catalogue page: leave out --fault");
        }
        let options = posconform::run::plant::options(args.fuzz, args.seed);
        let results =
            posconform::run::plant::plant_all(&cases, &options, &args.fault, &mut progress)?;
        let text = match args.format {
            PlantFormat::Json => serde_json::to_string_pretty(&results)? + "\n",
            _ => report::explain::planted_text(&results),
        };
        (text, results)
    };
    match &args.out {
        Some(path) => write_atomic(path, text.as_bytes())
            .with_context(|| format!("writing {}", path.display()))?,
        None => write!(std::io::stdout().lock(), "{text}")?,
    }
    let caught = results.iter().all(|r| r.detected_by.is_some());
    let named = results.iter().filter(|r| r.top1).count();
    Ok(if caught && 10 * named >= 9 * results.len() {
        0
    } else {
        report::EXIT_NONCONFORMING
    })
}

fn list(name: Option<&str>) -> anyhow::Result<u8> {
    let mut out = std::io::stdout().lock();
    if let Some(name) = name {
        for case in suite(name)? {
            writeln!(out, "{:<52} {:<5} {}", case.id, case.dtype, case.purpose)?;
            if !case.faults.is_empty() {
                writeln!(out, "{:<52} exposes: {}", "", case.faults.join(", "))?;
            }
        }
        return Ok(0);
    }
    writeln!(out, "schemes:")?;
    for scheme in Scheme::ALL {
        writeln!(out, "  {:<12} {}", scheme.name(), scheme.source())?;
    }
    writeln!(out, "operations: encode, scores, attention, stream, decode")?;
    writeln!(out, "suites:")?;
    for name in SUITES {
        writeln!(out, "  {:<12} {} cases", name, suite(name)?.len())?;
    }
    Ok(0)
}

fn emit(name: &str, out: &Path, factor: f64) -> anyhow::Result<u8> {
    factor_ok(factor)?;
    let cases = suite(name)?;
    let emitted = posconform::vector::emit_into(name, &cases, out, factor)
        .with_context(|| format!("writing suite {name} to {}", out.display()))?;
    let bytes: u64 = emitted
        .written
        .iter()
        .filter_map(|p| std::fs::metadata(p).ok())
        .map(|m| m.len())
        .sum();
    eprintln!(
        "wrote {} cases of suite {name} to {} ({} files, {:.1} MB){}",
        cases.len(),
        out.display(),
        emitted.written.len(),
        bytes as f64 / 1e6,
        if emitted.removed.is_empty() {
            String::new()
        } else {
            format!(
                "; removed {} files an earlier emit had written",
                emitted.removed.len()
            )
        }
    );
    Ok(0)
}

/// Prints the report (text followed by `extra`), writes the requested files, and
/// returns the exit code.
fn finish(report: &Report, args: &OutputArgs, extra: &str) -> anyhow::Result<u8> {
    // Files first: a broken pipe on stdout must not lose them.
    if let Some(path) = &args.junit {
        write_atomic(path, report::junit::render(report).as_bytes())?;
    }
    if let Some(path) = &args.json {
        write_atomic(path, report::json::render(report).as_bytes())?;
    }
    let mut heatmaps = Vec::new();
    if let Some(dir) = &args.svg {
        for case in &report.cases {
            for output in case.outputs.iter().filter(|o| !o.passed) {
                if let Some(svg) = report::svg::heatmap(case, output) {
                    let path = dir.join(format!("{}.{}.svg", case.case, output.name));
                    write_atomic(&path, svg.as_bytes())?;
                    heatmaps.push(path);
                }
            }
        }
    }
    let text = match args.format {
        Format::Text => report::text::render(report) + extra,
        Format::Json => report::json::render(report),
    };
    let mut stdout = std::io::stdout().lock();
    let _ = stdout.write_all(text.as_bytes());
    if !heatmaps.is_empty() && args.format == Format::Text {
        let _ = writeln!(
            stdout,
            "heatmaps: {}",
            heatmaps
                .iter()
                .map(|p| p.display().to_string())
                .collect::<Vec<_>>()
                .join(", ")
        );
    }
    Ok(report.exit_code())
}
