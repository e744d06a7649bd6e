//! The `kiln` command line: reads files, calls the library, prints. It holds no statistics.

use kiln::common::error::KilnError;
use kiln::report;
use kiln::run;
use std::process::ExitCode;

const USAGE: &str = "\
kiln: modes, log evidence (log Z) and cross-checks for multimodal densities

Usage:
  kiln check SPEC.json [--json]       modes, Laplace log Z, grid log Z (1-2 unknowns), exact answers
  kiln run SPEC.json [options]        sample: log Z ± SE, mode masses, unknowns, cross-checks
  kiln compare A.json B.json [options]
                                      Bayes factor log(Z_A / Z_B) ± SE from two runs
  kiln bench [--quick] [--json]       Kiln against AIS, parallel tempering, IS and NUTS at equal cost
  kiln --help | --version

Options of run and compare (they override the spec's \"settings\"):
  --seed N            random seed (default 1)
  --chains K          chains (default 4)
  --draws N           kept draws per chain (default 2000)
  --warmup N          warm-up iterations per chain (default 1000)
  --method M          joint | alternating (default alternating)
  --integrator I      nuts | hmc (default nuts)
  --json              print one JSON object instead of the report
  --draws-csv PATH    (run) write resampled target draws as CSV
  --data FILE.csv     (check, run) use this CSV file (header row naming the columns) as the data

Exit codes: 0 success, 2 bad input (the message on standard error says where and how to fix it).";

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
                    Some(k) => format!("did you mean `{k}`? `kiln --help` lists the options"),
                    None => "`kiln --help` lists the options".to_string(),
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
    match cmd.as_str() {
        "-h" | "--help" | "help" => Ok(USAGE.to_string()),
        "-V" | "--version" => Ok(format!("kiln {}", env!("CARGO_PKG_VERSION"))),
        "check" => {
            let (files, opts) = parse_options(&args[1..], false, true)?;
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
            let (files, opts) = parse_options(&args[1..], true, true)?;
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
            let (files, opts) = parse_options(&args[1..], false, false)?;
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
            let known = ["check", "run", "compare"];
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
