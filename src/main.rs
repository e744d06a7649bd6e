//! The `kiln` command line: reads files, calls the library, prints. It holds no statistics.

use kiln::common::error::KilnError;
use kiln::report;
use kiln::run;
use std::process::ExitCode;

const USAGE: &str = "\
kiln: the modes of a density, its log evidence (log Z) with an honest error bar, and checks

Commands:
  kiln check SPEC.json     the modes, the Laplace and grid values of log Z, exact answers
  kiln run SPEC.json       sample it: a verdict, log Z ± SE, mode masses, the unknowns
  kiln compare A.json B.json
                           the log Bayes factor log(Z_A / Z_B) ± SE of two models
  kiln bench               Kiln against other estimators at equal cost
  kiln --version

`kiln COMMAND --help` describes a command and its options.
Exit codes: 0 success, 2 bad input (the message on standard error says where and what to try).";

/// Options that `run` and `compare` share, with their defaults.
const SAMPLING_OPTIONS: &str =
    "  --seed N            random seed (default 1: every run is reproducible)
  --chains K          chains, 1 to 64 (default 8)
  --draws N           kept draws per chain (default 1000)
  --warmup N          warm-up iterations per chain (default 500)
  --method M          alternating: position moves, then an exact draw of β (default)
                      joint: β moves with the position
  --integrator I      nuts: trajectories that stop when they turn back (default)
                      hmc: trajectories of fixed length
  --json              print one JSON object instead of the report";

/// What the spec's settings add to the options.
const SETTINGS_NOTE: &str =
    "The options override the spec's \"settings\", which also take \"starts\" (optimiser
starts of the mode search) and \"acceptance_goal\" (the average acceptance of the Hamiltonian
moves that warm-up tunes the step size to reach, default 0.8).";

const RUN_HELP: &str = "\
kiln run SPEC.json [options]

Finds the modes, samples the density by continuously tempered Hamiltonian Monte Carlo between
their Laplace mixture and the density, and reports: the verdict of the independent checks;
the warnings, each with what to do; log Z ± SE beside every check; the modes by mass; the mode
search's evidence; the unknowns (median, 90 % interval, mean ± sd, R-hat, effective draws);
diagnostics; and the notes on what Kiln chose.

Options:
{SAMPLING}
  --data FILE.csv     use this CSV file (a header row naming the columns) as the data
  --draws-csv PATH    also write resampled target draws as CSV (one column per unknown, then
                      beta, weight, chain, iteration, mode)

{SETTINGS}";

const CHECK_HELP: &str = "\
kiln check SPEC.json [--data FILE.csv] [--json]

Reads and checks the spec, then reports without sampling: the unknowns and data, the modes
(location, energy, Laplace mass) by Laplace mass, the Laplace value of log Z, the grid value
(one or two unknowns), the exact answers of a Gaussian mixture, and the mode search's
evidence. A bad spec is an error that says where, shows the line and what to try.

Options:
  --data FILE.csv     use this CSV file (a header row naming the columns) as the data
  --json              print one JSON object instead of the report";

const COMPARE_HELP: &str = "\
kiln compare A.json B.json [options]

Runs both specs on the same terms and reports the log Bayes factor log(Z_A / Z_B) ± SE
(SE = √(SE_A² + SE_B²)) with what it means, both runs' verdicts and mode-search figures, and
both runs' warnings. When either run's verdict is not \"agree\", the number is reported as
not to be used, with the reason.

Options:
{SAMPLING}

{SETTINGS}";

const BENCH_HELP: &str = "\
kiln bench [--quick] [--json] [--targets a,b] [--methods m,n] [--budgets 2e4,2e5]
           [--seeds N] [--no-speed]
kiln bench --growth [--json]

Measures Kiln against annealed importance sampling (ais), parallel tempering with the
stepping-stone estimator (pt), importance sampling (is) and plain NUTS (nuts, masses only) at
equal budgets of energy evaluations on reference targets, and the formula engine's speed. The
whole benchmark writes its tables to BENCHMARKS.md; a part (any of the options below but
--quick and --json) only prints.

Options:
  --quick             fewer budgets and seeds
  --json              print one JSON object instead of the tables
  --targets a,b       only these targets: {TARGETS}
  --methods m,n       only these methods: kiln, ais, pt, is, nuts
  --budgets 2e4,2e5   only these budgets of energy evaluations (1e3 to 1e9)
  --seeds N           seeds per target and budget (1 to 1000)
  --no-speed          leave out the engine's speed
  --growth            instead: the cost of log Z RMSE 0.05 for Kiln, AIS and PT in 2 to 16
                      unknowns, with the fitted growth exponent (writes its section of
                      BENCHMARKS.md and bench/plots/growth-dims.svg)";

/// The help of one command (`kiln COMMAND --help`).
fn command_help(cmd: &str) -> Option<String> {
    let text = match cmd {
        "run" => RUN_HELP
            .replace("{SAMPLING}", SAMPLING_OPTIONS)
            .replace("{SETTINGS}", SETTINGS_NOTE),
        "check" => CHECK_HELP.to_string(),
        "compare" => COMPARE_HELP
            .replace("{SAMPLING}", SAMPLING_OPTIONS)
            .replace("{SETTINGS}", SETTINGS_NOTE),
        "bench" => {
            let names: Vec<&str> = kiln::bench::targets::targets()
                .iter()
                .map(|t| t.name)
                .collect();
            BENCH_HELP.replace("{TARGETS}", &names.join(", "))
        }
        _ => return None,
    };
    Some(text)
}

fn read_spec(path: &str) -> Result<kiln::Spec, KilnError> {
    let text = std::fs::read_to_string(path).map_err(|e| {
        KilnError::usage(format!("cannot read `{path}`: {e}"))
            .with_hint("check the path and that the file is UTF-8 text")
    })?;
    kiln::parse_spec(path, &text)
}

/// The spec, with its data replaced by the CSV file of `--data` if given.
fn read_spec_with(path: &str, data: &Option<String>) -> Result<kiln::Spec, KilnError> {
    let spec = read_spec(path)?;
    let Some(csv) = data else { return Ok(spec) };
    let too_big = std::fs::metadata(csv)
        .map(|m| m.len() > kiln::model::table::MAX_CSV_BYTES as u64)
        .unwrap_or(false);
    if too_big {
        return Err(KilnError::limit(format!(
            "`{csv}` is larger than {} bytes (64 MiB), the largest data file accepted",
            kiln::model::table::MAX_CSV_BYTES
        ))
        .with_hint("thin or aggregate the data (for example into counts per bin)"));
    }
    let text = std::fs::read_to_string(csv).map_err(|e| {
        KilnError::usage(format!("cannot read `{csv}`: {e}"))
            .with_hint("check the path and that the file is UTF-8 text")
    })?;
    kiln::model::spec::with_data_csv(&spec, &text)
}

fn to_json<T: serde::Serialize>(v: &T) -> Result<String, KilnError> {
    serde_json::to_string_pretty(v)
        .map_err(|e| KilnError::usage(format!("could not write JSON: {e}")))
}

struct Options {
    json: bool,
    draws_csv: Option<String>,
    data: Option<String>,
    overrides: run::Overrides,
}

fn number<T: std::str::FromStr>(flag: &str, v: Option<&String>) -> Result<T, KilnError> {
    let v = v.ok_or_else(|| {
        KilnError::usage(format!("{flag} needs a value")).with_hint(format!("for example {flag} 4"))
    })?;
    v.parse().map_err(|_| {
        KilnError::usage(format!("{flag} expects a whole number, not `{v}`"))
            .with_hint(format!("for example {flag} 4"))
    })
}

/// Splits arguments into files and options; `csv` allows --draws-csv, `data` allows --data.
fn parse_options(
    cmd: &str,
    args: &[String],
    csv: bool,
    data: bool,
) -> Result<(Vec<String>, Options), KilnError> {
    let mut o = Options {
        json: false,
        draws_csv: None,
        data: None,
        overrides: run::Overrides::default(),
    };
    let mut files = Vec::new();
    let mut i = 0;
    while i < args.len() {
        let a = args[i].as_str();
        let next = args.get(i + 1);
        match a {
            "--json" => o.json = true,
            "--seed" => {
                o.overrides.seed = Some(number(a, next)?);
                i += 1;
            }
            "--chains" => {
                o.overrides.chains = Some(number(a, next)?);
                i += 1;
            }
            "--draws" => {
                o.overrides.draws = Some(number(a, next)?);
                i += 1;
            }
            "--warmup" => {
                o.overrides.warmup = Some(number(a, next)?);
                i += 1;
            }
            "--method" => {
                o.overrides.method = Some(next.cloned().ok_or_else(|| {
                    KilnError::usage("--method needs a value").with_hint("joint or alternating")
                })?);
                i += 1;
            }
            "--integrator" => {
                o.overrides.integrator = Some(next.cloned().ok_or_else(|| {
                    KilnError::usage("--integrator needs a value").with_hint("nuts or hmc")
                })?);
                i += 1;
            }
            "--draws-csv" if csv => {
                o.draws_csv = Some(next.cloned().ok_or_else(|| {
                    KilnError::usage("--draws-csv needs a path").with_hint("--draws-csv draws.csv")
                })?);
                i += 1;
            }
            "--data" if data => {
                o.data = Some(next.cloned().ok_or_else(|| {
                    KilnError::usage("--data needs a path").with_hint("--data measurements.csv")
                })?);
                i += 1;
            }
            s if s.starts_with('-') => {
                let known = [
                    "--data",
                    "--json",
                    "--seed",
                    "--chains",
                    "--draws",
                    "--warmup",
                    "--method",
                    "--integrator",
                    "--draws-csv",
                ];
                let hint = match kiln::common::error::nearest(s, known) {
                    Some(k) => format!("did you mean `{k}`? `kiln {cmd} --help` lists the options"),
                    None => format!("`kiln {cmd} --help` lists the options"),
                };
                return Err(KilnError::usage(format!("unknown option `{s}`")).with_hint(hint));
            }
            s => files.push(s.to_string()),
        }
        i += 1;
    }
    Ok((files, o))
}

fn dispatch(args: &[String]) -> Result<String, KilnError> {
    let Some(cmd) = args.first() else {
        return Err(KilnError::usage("no command given")
            .with_hint("try `kiln check SPEC.json`; `kiln --help` lists the commands"));
    };
    let wants_help = args[1..].iter().any(|a| a == "--help" || a == "-h");
    if wants_help {
        if let Some(h) = command_help(cmd) {
            return Ok(h);
        }
    }
    match cmd.as_str() {
        "-h" | "--help" => Ok(USAGE.to_string()),
        "help" => Ok(args
            .get(1)
            .and_then(|c| command_help(c))
            .unwrap_or_else(|| USAGE.to_string())),
        "-V" | "--version" => Ok(format!("kiln {}", env!("CARGO_PKG_VERSION"))),
        "check" => {
            let (files, opts) = parse_options("check", &args[1..], false, true)?;
            if files.len() != 1 {
                return Err(KilnError::usage("`kiln check` takes exactly one spec file")
                    .with_hint("kiln check SPEC.json [--json]"));
            }
            let spec = read_spec_with(&files[0], &opts.data)?;
            let outcome = run::check(&spec)?;
            if opts.json {
                to_json(&outcome)
            } else {
                Ok(report::check_text(&outcome))
            }
        }
        "run" => {
            let (files, opts) = parse_options("run", &args[1..], true, true)?;
            if files.len() != 1 {
                return Err(KilnError::usage("`kiln run` takes exactly one spec file")
                    .with_hint("kiln run SPEC.json [options]"));
            }
            let spec = read_spec_with(&files[0], &opts.data)?;
            let result = run::run(&spec, &opts.overrides)?;
            if let Some(path) = &opts.draws_csv {
                std::fs::write(path, report::run_draws_csv(&result))
                    .map_err(|e| KilnError::usage(format!("cannot write `{path}`: {e}")))?;
            }
            if opts.json {
                to_json(&result.outcome)
            } else {
                Ok(report::run_text(&result.outcome))
            }
        }
        "compare" => {
            let (files, opts) = parse_options("compare", &args[1..], false, false)?;
            if files.len() != 2 {
                return Err(
                    KilnError::usage("`kiln compare` takes exactly two spec files")
                        .with_hint("kiln compare A.json B.json [options]"),
                );
            }
            let a = run::run(&read_spec(&files[0])?, &opts.overrides)?;
            let b = run::run(&read_spec(&files[1])?, &opts.overrides)?;
            let c = run::compare(a.outcome, b.outcome);
            if opts.json {
                to_json(&c)
            } else {
                Ok(report::compare_text(&c, &files[0], &files[1]))
            }
        }
        "bench" => kiln::bench::command(&args[1..]),
        other => {
            let known = ["check", "run", "compare", "bench"];
            let hint = match kiln::common::error::nearest(other, known) {
                Some(k) => format!("did you mean `kiln {k}`?"),
                None => "`kiln --help` lists the commands".to_string(),
            };
            Err(KilnError::usage(format!("unknown command `{other}`")).with_hint(hint))
        }
    }
}

fn main() -> ExitCode {
    let args: Vec<String> = std::env::args().skip(1).collect();
    match dispatch(&args) {
        Ok(out) => {
            println!("{}", out.trim_end());
            ExitCode::SUCCESS
        }
        Err(e) => {
            eprint!("{}", e.render());
            ExitCode::from(2)
        }
    }
}
