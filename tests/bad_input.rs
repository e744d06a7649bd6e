//! The bad-input catalogue: every way a user can get a spec wrong, run through the real `kiln`
//! binary.
//!
//! Each case writes a spec file into its own folder under the system temporary directory, runs
//! `kiln check` on it and checks what the user sees: exit code exactly 2, a message that names
//! the fault on the `problem` line, the place (`where    energy, line L, column C`, the source
//! line and a marker line of `‾` under the fault) where the fault is in one place, a `try` line,
//! and never a panic.

use std::fs;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

/// Longest any single run may take before it counts as a hang.
const TIME_LIMIT: Duration = Duration::from_secs(30);

/// What one run of the binary produced.
struct Run {
    what: String,
    code: Option<i32>,
    stdout: String,
    stderr: String,
}

/// A fresh, empty folder for one case.
fn case_dir(case: &str) -> PathBuf {
    let dir = std::env::temp_dir()
        .join(format!("kiln-bad-input-{}", std::process::id()))
        .join(case);
    let _ = fs::remove_dir_all(&dir);
    fs::create_dir_all(&dir).expect("cannot create a scratch folder");
    dir
}

/// Runs `kiln` with `args` in `dir`, with a time limit; output goes to files so that large
/// messages cannot block the child on a full pipe.
fn run_in(dir: &Path, what: &str, args: &[&str]) -> Run {
    let out_path = dir.join("stdout.txt");
    let err_path = dir.join("stderr.txt");
    let mut child = Command::new(env!("CARGO_BIN_EXE_kiln"))
        .args(args)
        .current_dir(dir)
        .stdin(Stdio::null())
        .stdout(fs::File::create(&out_path).unwrap())
        .stderr(fs::File::create(&err_path).unwrap())
        .spawn()
        .expect("cannot start the kiln binary");
    let start = Instant::now();
    let status = loop {
        if let Some(status) = child.try_wait().unwrap() {
            break status;
        }
        if start.elapsed() > TIME_LIMIT {
            let _ = child.kill();
            let _ = child.wait();
            panic!("{what}: kiln did not finish within {TIME_LIMIT:?} (a hang)");
        }
        std::thread::sleep(Duration::from_millis(5));
    };
    Run {
        what: what.to_string(),
        code: status.code(),
        stdout: String::from_utf8_lossy(&fs::read(&out_path).unwrap()).into_owned(),
        stderr: String::from_utf8_lossy(&fs::read(&err_path).unwrap()).into_owned(),
    }
}

/// Writes `text` as `spec.json` into the case's folder and runs `kiln check spec.json`.
fn check_bytes(case: &str, text: &[u8]) -> Run {
    let dir = case_dir(case);
    fs::write(dir.join("spec.json"), text).unwrap();
    let run = run_in(&dir, case, &["check", "spec.json"]);
    let _ = fs::remove_dir_all(&dir);
    run
}

fn check(case: &str, text: &str) -> Run {
    check_bytes(case, text.as_bytes())
}

/// A spec with the given formula as its energy and the given variables and data (JSON text).
fn energy_spec(variables: &str, data: Option<&str>, energy: &str) -> String {
    let energy = json_string(energy);
    match data {
        Some(d) => {
            format!("{{\"variables\": {variables},\n \"data\": {d},\n \"energy\": {energy}}}")
        }
        None => format!("{{\"variables\": {variables},\n \"energy\": {energy}}}"),
    }
}

/// `s` as a JSON string literal.
fn json_string(s: &str) -> String {
    let mut out = String::from("\"");
    for c in s.chars() {
        match c {
            '"' => out.push_str("\\\""),
            '\\' => out.push_str("\\\\"),
            '\n' => out.push_str("\\n"),
            '\t' => out.push_str("\\t"),
            c if (c as u32) < 0x20 => out.push_str(&format!("\\u{:04x}", c as u32)),
            c => out.push(c),
        }
    }
    out.push('"');
    out
}

const X: &str = r#"[{"name": "x"}]"#;

impl Run {
    fn show(&self) -> String {
        format!(
            "case `{}`: exit code {:?}\n--- stderr ---\n{}\n--- stdout ---\n{}",
            self.what,
            self.code,
            truncated(&self.stderr),
            truncated(&self.stdout)
        )
    }

    /// Exit code exactly 2, a diagnostic on stderr, nothing on stdout, no panic.
    fn bad_input(&self) -> &Run {
        assert!(
            !self.stderr.contains("panicked"),
            "kiln panicked\n{}",
            self.show()
        );
        assert!(
            !self.stderr.contains("RUST_BACKTRACE"),
            "kiln panicked\n{}",
            self.show()
        );
        assert_eq!(self.code, Some(2), "wrong exit code\n{}", self.show());
        assert!(
            self.stderr.starts_with("problem  "),
            "stderr does not start with `problem  `\n{}",
            self.show()
        );
        assert!(
            self.stdout.trim().is_empty(),
            "an error printed to stdout\n{}",
            self.show()
        );
        self
    }

    /// The message (anywhere on stderr) contains `fragment`.
    fn says(&self, fragment: &str) -> &Run {
        assert!(
            self.stderr.contains(fragment),
            "stderr lacks {fragment:?}\n{}",
            self.show()
        );
        self
    }

    /// The first line, `problem  …`, contains `fragment`.
    fn error_line(&self, fragment: &str) -> &Run {
        let first = self.stderr.lines().next().unwrap_or("");
        assert!(
            first.contains(fragment),
            "the problem line lacks {fragment:?}\n{}",
            self.show()
        );
        self
    }

    /// A `try` line (the suggestion) containing `fragment`.
    fn hint(&self, fragment: &str) -> &Run {
        let ok = self
            .stderr
            .lines()
            .any(|l| l.starts_with("try      ") && l.contains(fragment));
        assert!(ok, "no `try` line containing {fragment:?}\n{}", self.show());
        self
    }

    /// Some `try` line.
    fn any_hint(&self) -> &Run {
        let ok = self.stderr.lines().any(|l| l.starts_with("try      "));
        assert!(ok, "no `try` line\n{}", self.show());
        self
    }

    /// No location: the fault is not in one place of the text.
    fn unlocated(&self) -> &Run {
        assert!(
            !self.stderr.lines().any(|l| l.starts_with("where ")),
            "unexpected location\n{}",
            self.show()
        );
        self
    }

    /// The location block: `where    SOURCE, line L, column C`, then the source line indented
    /// by nine columns (its text `line_text`), then a marker line whose first `‾` sits under
    /// column C; returns the marker's width.
    fn located(&self, source: &str, line: usize, column: usize, line_text: Option<&str>) -> usize {
        let lines: Vec<&str> = self.stderr.lines().collect();
        let place = format!("where    {source}, line {line}, column {column}");
        let Some(i) = lines.iter().position(|l| *l == place) else {
            panic!("no line `{place}`\n{}", self.show());
        };
        assert!(
            lines.len() > i + 2,
            "the location block is cut short\n{}",
            self.show()
        );
        let pad = " ".repeat(9);
        assert!(
            lines[i + 1].starts_with(&pad),
            "bad source line\n{}",
            self.show()
        );
        let shown = &lines[i + 1][pad.len()..];
        if let Some(t) = line_text {
            assert_eq!(shown, t, "the wrong source line is shown\n{}", self.show());
        }
        assert!(
            lines[i + 2].starts_with(&pad),
            "bad marker line\n{}",
            self.show()
        );
        let under = &lines[i + 2][pad.len()..];
        let lead = under
            .chars()
            .take_while(|c| *c == ' ' || *c == '\t')
            .count();
        assert_eq!(
            lead + 1,
            column,
            "the marker is not under column {column}\n{}",
            self.show()
        );
        let marks = under.chars().skip(lead).take_while(|c| *c == '‾').count();
        assert!(marks >= 1, "no marker\n{}", self.show());
        assert_eq!(
            under.chars().skip(lead + marks).count(),
            0,
            "junk after the marker\n{}",
            self.show()
        );
        marks
    }

    /// Located in the energy formula at `line`, `column`, with `width` carets.
    fn at(&self, line: usize, column: usize, width: usize, line_text: &str) -> &Run {
        let carets = self.located("energy", line, column, Some(line_text));
        assert_eq!(carets, width, "expected {width} carets\n{}", self.show());
        self
    }

    /// Located in the spec file `spec.json` at `line`, `column`.
    fn at_json(&self, line: usize, column: usize) -> &Run {
        self.located("spec.json", line, column, None);
        self
    }

    /// Located in the spec file on `line`, at any column.
    fn at_json_line(&self, line: usize) -> &Run {
        let prefix = format!("where    spec.json, line {line}, column ");
        let Some(l) = self.stderr.lines().find(|l| l.starts_with(&prefix)) else {
            panic!("no location on line {line} of spec.json\n{}", self.show());
        };
        let column: usize = l[prefix.len()..].parse().expect("a column number");
        self.located("spec.json", line, column, None);
        self
    }
}

fn truncated(s: &str) -> String {
    if s.chars().count() <= 2000 {
        s.to_string()
    } else {
        let head: String = s.chars().take(2000).collect();
        format!("{head}… ({} bytes in all)", s.len())
    }
}

// ---------------------------------------------------------------------------------------------
// The JSON file and its shape.

#[test]
fn malformed_json_points_at_the_missing_comma() {
    let text = "{\n  \"variables\": [{\"name\": \"x\"}]\n  \"energy\": \"x^2\"\n}\n";
    check("malformed_json", text)
        .bad_input()
        .error_line("the spec is not valid")
        .says("expected `,` or `}`")
        .at_json(3, 3)
        .hint("missing comma");
}

#[test]
fn truncated_json_says_the_file_ends_early() {
    check(
        "truncated_json",
        "{\"variables\": [{\"name\": \"x\"}], \"energy\": \"x^",
    )
    .bad_input()
    .error_line("the spec is not valid")
    .at_json_line(1)
    .hint("the file ends early");
}

#[test]
fn empty_file() {
    check("empty_file", "")
        .bad_input()
        .error_line("the spec must be a JSON object, but the file is empty")
        .any_hint();
}

#[test]
fn unknown_top_level_key_names_the_nearest_allowed_key() {
    let text = "{\n  \"variables\": [{\"name\": \"x\"}],\n  \"energi\": \"x^2\"\n}\n";
    check("unknown_top_key", text)
        .bad_input()
        .says("unknown field `energi`")
        .at_json_line(3)
        .hint("did you mean `energy`?");
    check(
        "unknown_top_key_settings",
        r#"{"variables": [{"name": "x"}], "energy": "x^2", "setings": {"seed": 2}}"#,
    )
    .bad_input()
    .says("unknown field `setings`")
    .hint("did you mean `settings`?");
}

#[test]
fn unknown_key_in_a_variable_names_the_nearest_allowed_key() {
    let text = "{\n  \"variables\": [{\"name\": \"x\", \"uper\": 3}],\n  \"energy\": \"x^2\"\n}\n";
    check("unknown_variable_key", text)
        .bad_input()
        .says("unknown field `uper`")
        .at_json_line(2)
        .hint("did you mean `upper`?");
}

#[test]
fn unknown_key_in_settings_and_in_a_mixture_component() {
    check(
        "unknown_settings_key",
        r#"{"variables": [{"name": "x"}], "energy": "x^2", "settings": {"sead": 3}}"#,
    )
    .bad_input()
    .says("unknown field `sead`")
    .hint("did you mean `seed`?");
    check(
        "unknown_component_key",
        r#"{"mixture": [{"weight": 1, "mean": [0], "sds": [1]}]}"#,
    )
    .bad_input()
    .says("unknown field `sds`")
    .hint("did you mean `sd`?");
}

#[test]
fn wrong_json_types() {
    check(
        "energy_is_a_number",
        r#"{"variables": [{"name": "x"}], "energy": 5}"#,
    )
    .bad_input()
    .says("expected a string")
    .at_json(1, 42)
    .any_hint();
    check(
        "variables_is_an_object",
        r#"{"variables": {"name": "x"}, "energy": "x^2"}"#,
    )
    .bad_input()
    .says("expected a sequence")
    .at_json_line(1)
    .any_hint();
    check(
        "negative_seed",
        r#"{"variables": [{"name": "x"}], "energy": "x^2", "settings": {"seed": -1}}"#,
    )
    .bad_input()
    .says("`-1`")
    .at_json_line(1)
    .any_hint();
    check(
        "number_in_quotes",
        r#"{"variables": [{"name": "x", "lower": "0"}], "energy": "x^2"}"#,
    )
    .bad_input()
    .says("expected f64")
    .hint("without quotes");
}

#[test]
fn no_target() {
    check("no_target", r#"{"variables": [{"name": "x"}]}"#)
        .bad_input()
        .error_line("the spec has no target")
        .unlocated()
        .hint("\"energy\", \"log_density\" or \"mixture\"");
}

#[test]
fn two_targets() {
    check(
        "two_targets",
        r#"{"variables": [{"name": "x"}], "energy": "x^2", "log_density": "-x^2"}"#,
    )
    .bad_input()
    .error_line("more than one target")
    .says("\"energy\" and \"log_density\"")
    .hint("keep exactly one");
    check(
        "energy_and_mixture",
        r#"{"energy": "x^2", "mixture": [{"weight": 1, "mean": [0], "sd": [1]}]}"#,
    )
    .bad_input()
    .says("\"energy\" and \"mixture\"")
    .any_hint();
}

#[test]
fn no_unknowns() {
    check("no_variables", r#"{"energy": "1"}"#)
        .bad_input()
        .error_line("the spec has no unknowns")
        .hint("\"variables\"");
    check("empty_variables", r#"{"variables": [], "energy": "1"}"#)
        .bad_input()
        .error_line("the spec has no unknowns")
        .hint("\"variables\"");
}

#[test]
fn duplicate_variable_names() {
    check(
        "duplicate_variable",
        r#"{"variables": [{"name": "x"}, {"name": "y"}, {"name": "x"}], "energy": "x^2 + y^2"}"#,
    )
    .bad_input()
    .error_line("variable `x` is listed twice")
    .hint("its own name");
}

#[test]
fn data_column_with_the_name_of_an_unknown() {
    check(
        "data_unknown_clash",
        r#"{"variables": [{"name": "mu"}], "data": {"mu": [1, 2]}, "energy": "sum((mu - 1)^2)"}"#,
    )
    .bad_input()
    .error_line("`mu` is both a variable and a data column")
    .hint("rename one");
}

#[test]
fn reserved_names() {
    check(
        "variable_named_exp",
        r#"{"variables": [{"name": "exp"}], "energy": "exp^2"}"#,
    )
    .bad_input()
    .error_line("variable name `exp` is reserved")
    .hint("`exp_`");
    check(
        "variable_named_pi",
        r#"{"variables": [{"name": "pi"}], "energy": "pi^2"}"#,
    )
    .bad_input()
    .error_line("variable name `pi` is reserved")
    .any_hint();
    check(
        "data_column_named_sum",
        r#"{"variables": [{"name": "x"}], "data": {"sum": [1]}, "energy": "x^2"}"#,
    )
    .bad_input()
    .error_line("data column name `sum` is reserved")
    .any_hint();
}

#[test]
fn invalid_names() {
    check(
        "variable_named_1x",
        r#"{"variables": [{"name": "1x"}], "energy": "x^2"}"#,
    )
    .bad_input()
    .error_line("variable name `1x` is not a valid name")
    .hint("letters, digits and `_`");
    check(
        "variable_named_empty",
        r#"{"variables": [{"name": ""}], "energy": "x^2"}"#,
    )
    .bad_input()
    .error_line("is not a valid name")
    .any_hint();
    check(
        "data_column_with_space",
        r#"{"variables": [{"name": "x"}], "data": {"my col": [1]}, "energy": "x^2"}"#,
    )
    .bad_input()
    .error_line("data column name `my col` is not a valid name")
    .any_hint();
}

#[test]
fn unequal_data_column_lengths() {
    check(
        "unequal_columns",
        r#"{"variables": [{"name": "x"}], "data": {"a": [1, 2, 3], "b": [1, 2]}, "energy": "sum((a - b*x)^2)"}"#,
    )
    .bad_input()
    .error_line("data column `b` has 2 values but `a` has 3")
    .hint("same number of rows");
}

#[test]
fn empty_data_column() {
    check(
        "empty_column",
        r#"{"variables": [{"name": "x"}], "data": {"a": []}, "energy": "x^2"}"#,
    )
    .bad_input()
    .error_line("data column `a` is empty")
    .hint("at least one value");
}

#[test]
fn data_column_given_twice() {
    check(
        "duplicate_column",
        r#"{"variables": [{"name": "x"}], "data": {"a": [1], "a": [2]}, "energy": "sum((a - x)^2)"}"#,
    )
    .bad_input()
    .says("data column `a` appears twice")
    .at_json_line(1);
}

// ---------------------------------------------------------------------------------------------
// Formula rules: names, functions, sum.

#[test]
fn data_used_outside_sum() {
    let f = "let s = 2;\n0.5 * ((x - len) / s)^2";
    check(
        "data_outside_sum",
        &energy_spec(X, Some(r#"{"len": [4.1, 3.9, 4.4]}"#), f),
    )
    .bad_input()
    .error_line("data column `len` used outside sum(…)")
    .at(2, 13, 3, "0.5 * ((x - len) / s)^2")
    .hint("wrap the term that uses it in sum(…)")
    .says("3 rows");
}

#[test]
fn data_inside_a_definition_is_outside_sum() {
    let f = "let r = len - x;\nsum(r^2)";
    check(
        "data_in_let",
        &energy_spec(X, Some(r#"{"len": [4.1, 3.9]}"#), f),
    )
    .bad_input()
    .error_line("data column `len` used outside sum(…)")
    .at(1, 9, 3, "let r = len - x;")
    .any_hint();
}

#[test]
fn nested_sum() {
    let f = "sum((x - a)^2 + sum(a))";
    check("nested_sum", &energy_spec(X, Some(r#"{"a": [1, 2]}"#), f))
        .bad_input()
        .error_line("sum(…) may not contain another sum(…)")
        .at(1, 17, 3, f)
        .hint("the enclosing sum starts at column 1");
}

#[test]
fn sum_without_data() {
    let f = "0.1 * x + sum(x^2)";
    check("sum_without_data", &energy_spec(X, None, f))
        .bad_input()
        .error_line("the spec has no data")
        .at(1, 11, 3, f)
        .hint("\"data\"");
}

#[test]
fn unknown_function_suggests_the_nearest() {
    let f = "let a = x + 3;\nlgama(a) + x^2";
    check("unknown_function", &energy_spec(X, None, f))
        .bad_input()
        .error_line("unknown function `lgama`")
        .at(2, 1, 5, "lgama(a) + x^2")
        .hint("did you mean `lgamma`?");
    let f = "x^2 + sqr(x)";
    check("unknown_function_sqr", &energy_spec(X, None, f))
        .bad_input()
        .error_line("unknown function `sqr`")
        .at(1, 7, 3, f)
        .hint("did you mean `sqrt`?");
}

#[test]
fn misspelt_unknown_suggests_the_nearest() {
    let f = "0.5 * thet^2";
    check(
        "unknown_name",
        &energy_spec(r#"[{"name": "theta"}]"#, None, f),
    )
    .bad_input()
    .error_line("unknown name `thet`")
    .at(1, 7, 4, f)
    .hint("did you mean `theta`?");
}

#[test]
fn unrelated_unknown_name_lists_the_known_names() {
    let f = "0.5 * (x - banana)^2";
    check("unrelated_name", &energy_spec(X, None, f))
        .bad_input()
        .error_line("unknown name `banana`")
        .at(1, 12, 6, f)
        .hint("\"variables\"");
}

#[test]
fn function_used_without_arguments() {
    let f = "exp + x^2";
    check("function_as_value", &energy_spec(X, None, f))
        .bad_input()
        .error_line("`exp` is a function and needs arguments")
        .at(1, 1, 3, f)
        .hint("exp(…)");
}

#[test]
fn wrong_arity() {
    let f = "x^2 + atan2(x)";
    check("atan2_one_argument", &energy_spec(X, None, f))
        .bad_input()
        .error_line("`atan2` takes exactly 2 arguments, found 1")
        .at(1, 7, 8, f)
        .hint("atan2(y, x)");
    let f = "sum(a, x) + x^2";
    check(
        "sum_two_arguments",
        &energy_spec(X, Some(r#"{"a": [1, 2]}"#), f),
    )
    .bad_input()
    .error_line("`sum` takes exactly 1 argument, found 2")
    .at(1, 1, 9, f)
    .any_hint();
    let f = "x^2 + max(x)";
    check("max_one_argument", &energy_spec(X, None, f))
        .bad_input()
        .error_line("`max` takes at least 2 arguments, found 1")
        .at(1, 7, 6, f)
        .any_hint();
    let f = "x^2 + exp()";
    check("exp_no_argument", &energy_spec(X, None, f))
        .bad_input()
        .error_line("`exp` takes exactly 1 argument, found 0")
        .any_hint();
}

#[test]
fn let_shadowing_an_unknown() {
    let f = "let y = 1;\nlet x = 2;\nx^2 + y";
    check("let_shadows_unknown", &energy_spec(X, None, f))
        .bad_input()
        .error_line("`x` is already an unknown")
        .at(2, 5, 1, "let x = 2;")
        .hint("another name");
}

#[test]
fn let_shadowing_a_data_column_a_constant_or_a_function() {
    let f = "let a = 1;\nsum((a - x)^2)";
    check(
        "let_shadows_data",
        &energy_spec(X, Some(r#"{"a": [1, 2]}"#), f),
    )
    .bad_input()
    .error_line("`a` is already a data column")
    .at(1, 5, 1, "let a = 1;")
    .any_hint();
    let f = "let pi = 3;\nx^2";
    check("let_shadows_pi", &energy_spec(X, None, f))
        .bad_input()
        .error_line("`pi` is already a built-in constant")
        .at(1, 5, 2, "let pi = 3;")
        .any_hint();
    let f = "let exp = 3;\nx^2";
    check("let_shadows_exp", &energy_spec(X, None, f))
        .bad_input()
        .error_line("`exp` is a built-in function")
        .at(1, 5, 3, "let exp = 3;")
        .any_hint();
    let f = "let a = x;\nlet a = 2 * x;\na^2";
    check("let_twice", &energy_spec(X, None, f))
        .bad_input()
        .error_line("`a` is already an earlier definition")
        .at(2, 5, 1, "let a = 2 * x;")
        .any_hint();
}

// ---------------------------------------------------------------------------------------------
// Formula syntax.

#[test]
fn malformed_number_with_two_points() {
    let f = "x^2 + 1.2.3";
    check("number_1_2_3", &energy_spec(X, None, f))
        .bad_input()
        .error_line("malformed number `1.2.3`")
        .at(1, 7, 5, f)
        .hint("at most one decimal point");
}

#[test]
fn malformed_number_running_into_a_name() {
    let f = "2x^2";
    check("number_2x", &energy_spec(X, None, f))
        .bad_input()
        .error_line("malformed number `2x`")
        .at(1, 1, 2, f)
        .hint("`2*x`");
}

#[test]
fn malformed_number_with_an_empty_exponent() {
    let f = "x^2 * 1e";
    check("number_1e", &energy_spec(X, None, f))
        .bad_input()
        .error_line("malformed number `1e`")
        .at(1, 7, 2, f)
        .hint("exponent");
    let f = "x^2 * 1e+";
    check("number_1e_plus", &energy_spec(X, None, f))
        .bad_input()
        .error_line("malformed number")
        .hint("exponent");
}

#[test]
fn unexpected_character() {
    let f = "x^2 $ 3";
    check("dollar", &energy_spec(X, None, f))
        .bad_input()
        .error_line("unexpected character `$`")
        .at(1, 5, 1, f)
        .any_hint();
    let f = "x^2 + (x < 3)";
    check("comparison", &energy_spec(X, None, f))
        .bad_input()
        .error_line("unexpected character `<`")
        .at(1, 10, 1, f)
        .hint("no comparisons");
    // A character outside ASCII: the column counts characters, not bytes.
    let f = "let a = 2;\nx² × a";
    check("superscript", &energy_spec(X, None, f))
        .bad_input()
        .error_line("unexpected character `²`")
        .at(2, 2, 1, "x² × a")
        .any_hint();
    let f = "let a = 2;\n\tx × a";
    check("times_sign", &energy_spec(X, None, f))
        .bad_input()
        .error_line("unexpected character `×`")
        .at(2, 4, 1, "\tx × a")
        .hint("multiplication is `*`");
    let f = "x^2 + [x]";
    // `[` now picks a vector's element; where a value is expected it is still an error.
    check("square_bracket", &energy_spec(X, None, f))
        .bad_input()
        .error_line("unexpected `[`")
        .at(1, 7, 1, f)
        .hint("round parentheses");
}

#[test]
fn unmatched_opening_parenthesis() {
    let f = "0.5 * (x^2 + 1";
    check("unclosed_paren", &energy_spec(X, None, f))
        .bad_input()
        .error_line("expected `)` to close the `(` at column 7")
        .at(1, 15, 1, f)
        .hint("closing `)`");
    let f = "exp(x";
    check("unclosed_call", &energy_spec(X, None, f))
        .bad_input()
        .error_line("expected `,` or `)` in the call of `exp`")
        .at(1, 6, 1, f)
        .any_hint();
}

#[test]
fn unmatched_closing_parenthesis() {
    let f = "x^2 + 1)";
    check("extra_close_paren", &energy_spec(X, None, f))
        .bad_input()
        .error_line("unmatched `)`")
        .at(1, 8, 1, f)
        .hint("remove it");
    let f = "()";
    check("empty_parens", &energy_spec(X, None, f))
        .bad_input()
        .error_line("unexpected `)`")
        .at(1, 2, 1, f)
        .any_hint();
}

#[test]
fn operator_without_operand() {
    let f = "x +* 2";
    check("plus_times", &energy_spec(X, None, f))
        .bad_input()
        .error_line("unexpected `*`")
        .at(1, 4, 1, f)
        .any_hint();
    let f = "x^2 +";
    check("trailing_plus", &energy_spec(X, None, f))
        .bad_input()
        .error_line("the formula ends where a value was expected")
        .any_hint();
    let f = "x^2 x";
    check("missing_operator", &energy_spec(X, None, f))
        .bad_input()
        .error_line("expected an operator or the end of the formula")
        .at(1, 5, 1, f)
        .hint("operator");
}

#[test]
fn empty_formula() {
    check("empty_formula", &energy_spec(X, None, ""))
        .bad_input()
        .error_line("the formula is empty")
        .at(1, 1, 1, "")
        .any_hint();
    check("blank_formula", &energy_spec(X, None, "   \n  "))
        .bad_input()
        .error_line("the formula is empty")
        .any_hint();
}

#[test]
fn formula_with_only_a_comment() {
    let f = "# the energy goes here";
    check("only_comment", &energy_spec(X, None, f))
        .bad_input()
        .error_line("the formula is empty")
        .at(1, 23, 1, f)
        .any_hint();
}

#[test]
fn definitions_without_a_final_expression() {
    let f = "let a = x^2;\nlet b = a + 1;";
    check("only_definitions", &energy_spec(X, None, f))
        .bad_input()
        .error_line("the formula has definitions but no final expression")
        .at(2, 15, 1, "let b = a + 1;")
        .hint("end the formula with the expression");
}

#[test]
fn definition_rules() {
    let f = "let a = x^2\na + 1";
    check("let_without_semicolon", &energy_spec(X, None, f))
        .bad_input()
        .error_line("expected `;` to end the definition of `a`")
        .at(2, 1, 1, "a + 1")
        .hint("semicolon");
    let f = "x + 1; let a = 2; a";
    check("let_after_expression", &energy_spec(X, None, f))
        .bad_input()
        .error_line("unexpected `;` after the final expression")
        .at(1, 6, 1, f)
        .any_hint();
    let f = "let 3 = x;\nx^2";
    check("let_number", &energy_spec(X, None, f))
        .bad_input()
        .error_line("expected a name after `let`")
        .at(1, 5, 1, "let 3 = x;")
        .any_hint();
}

#[test]
fn log_density_errors_name_their_field() {
    let text = r#"{"variables": [{"name": "x"}], "log_density": "-0.5 * x^2 + lgama(x)"}"#;
    let run = check("log_density_field", text);
    run.bad_input()
        .error_line("unknown function `lgama`")
        .hint("did you mean `lgamma`?");
    run.located("log_density", 1, 14, Some("-0.5 * x^2 + lgama(x)"));
}

// ---------------------------------------------------------------------------------------------
// Numbers and bounds.

#[test]
fn lower_bound_not_below_upper() {
    check(
        "lower_above_upper",
        r#"{"variables": [{"name": "x", "lower": 3, "upper": 1}], "energy": "x^2"}"#,
    )
    .bad_input()
    .error_line("variable `x`: the lower bound 3 is not below the upper bound 1")
    .hint("swap them");
    check(
        "lower_equals_upper",
        r#"{"variables": [{"name": "x", "lower": 2, "upper": 2}], "energy": "x^2"}"#,
    )
    .bad_input()
    .error_line("the lower bound 2 is not below the upper bound 2")
    .any_hint();
}

#[test]
fn non_finite_numbers_in_json() {
    let text = "{\"variables\": [{\"name\": \"x\",\n  \"upper\": 1e999}],\n \"energy\": \"x^2\"}";
    check("bound_1e999", text)
        .bad_input()
        .says("number out of range")
        .at_json_line(2)
        .hint("finite");
    check(
        "data_minus_1e999",
        r#"{"variables": [{"name": "x"}], "data": {"a": [1, -1e999]}, "energy": "sum((a - x)^2)"}"#,
    )
    .bad_input()
    .says("number out of range")
    .at_json_line(1)
    .hint("finite");
    check(
        "weight_1e999",
        r#"{"mixture": [{"weight": 1e999, "mean": [0], "sd": [1]}]}"#,
    )
    .bad_input()
    .says("number out of range")
    .hint("finite");
    check(
        "mean_1e400",
        r#"{"mixture": [{"weight": 1, "mean": [1e400], "sd": [1]}]}"#,
    )
    .bad_input()
    .says("number out of range")
    .hint("finite");
}

#[test]
fn nan_and_infinity_literals_in_json() {
    check(
        "nan_literal",
        r#"{"variables": [{"name": "x", "lower": NaN}], "energy": "x^2"}"#,
    )
    .bad_input()
    .error_line("the spec is not valid")
    .at_json(1, 39)
    .any_hint();
    check(
        "infinity_literal",
        r#"{"variables": [{"name": "x", "upper": Infinity}], "energy": "x^2"}"#,
    )
    .bad_input()
    .error_line("the spec is not valid")
    .at_json_line(1)
    .any_hint();
}

#[test]
fn non_finite_number_in_a_formula() {
    let f = "x^2 + 1e999";
    check("formula_1e999", &energy_spec(X, None, f))
        .bad_input()
        .error_line("the number `1e999` is too large to represent")
        .at(1, 7, 5, f)
        .hint("finite");
}

#[test]
fn bad_settings() {
    check(
        "starts_zero",
        r#"{"variables": [{"name": "x"}], "energy": "x^2", "settings": {"starts": 0}}"#,
    )
    .bad_input()
    .error_line("setting \"starts\" is 0")
    .hint("1..=10000");
    check(
        "method_unknown",
        r#"{"variables": [{"name": "x"}], "energy": "x^2", "settings": {"method": "fast"}}"#,
    )
    .bad_input()
    .error_line("setting \"method\"")
    .any_hint();
}

// ---------------------------------------------------------------------------------------------
// Limits: none of these may overflow the stack, hang or panic.

#[test]
fn thousands_of_parentheses_do_not_overflow_the_stack() {
    let f = format!("{}x^2{}", "(".repeat(5000), ")".repeat(5000));
    check("deep_parens", &energy_spec(X, None, &f))
        .bad_input()
        .error_line("nested too deeply")
        .hint("`let name = …;`");
    let f = format!(
        "{}x^2{}",
        "(".repeat(100_000 / 2 - 10),
        ")".repeat(100_000 / 2 - 10)
    );
    check("deepest_parens", &energy_spec(X, None, &f))
        .bad_input()
        .error_line("nested too deeply");
}

#[test]
fn other_deep_formulas_do_not_overflow_the_stack() {
    let cases = [
        ("deep_minus", format!("{}x^2", "-".repeat(20_000))),
        ("deep_plus_signs", format!("{}x^2", "+".repeat(20_000))),
        ("deep_power", format!("{}2", "x^".repeat(20_000))),
        (
            "deep_calls",
            format!("{}x{}", "exp(".repeat(5000), ")".repeat(5000)),
        ),
        (
            "long_sum_chain",
            format!("{}+x^2", vec!["x"; 5000].join("+")),
        ),
        (
            "long_product_chain",
            format!("{}*x^2", vec!["x"; 5000].join("*")),
        ),
        (
            "deep_inside_sum",
            format!("sum({}a{})", "(".repeat(5000), ")".repeat(5000)),
        ),
    ];
    for (name, f) in &cases {
        check(name, &energy_spec(X, Some(r#"{"a": [1]}"#), f))
            .bad_input()
            .error_line("nested too deeply")
            .any_hint();
    }
}

#[test]
fn deeply_nested_json_does_not_overflow_the_stack() {
    let text = format!(
        "{{\"variables\": [{{\"name\": \"x\"}}], \"energy\": \"x^2\", \"data\": {{\"a\": {}{}}}}}",
        "[".repeat(100_000),
        "]".repeat(100_000)
    );
    check("deep_json", &text)
        .bad_input()
        .error_line("the spec is not valid")
        .any_hint();
}

#[test]
fn over_long_formula() {
    let f = format!("x^2{}", " + 0.000001*x".repeat(20_000));
    check("long_formula", &energy_spec(X, None, &f))
        .bad_input()
        .error_line("the `energy` formula is 260003 bytes long; the limit is 100000")
        .unlocated()
        .hint("sum(…)");
}

#[test]
fn too_many_data_cells() {
    let col: Vec<&str> = vec!["0.5"; 500_001];
    let col = col.join(",");
    let text = format!(
        "{{\"variables\": [{{\"name\": \"x\"}}], \"data\": {{\"a\": [{col}], \"b\": [{col}]}}, \"energy\": \"sum((a - b*x)^2)\"}}"
    );
    check("too_many_cells", &text)
        .bad_input()
        .error_line("the data has 1000002 cells; the limit is 1000000")
        .hint("aggregate");
}

#[test]
fn too_many_unknowns_and_components() {
    let vars: Vec<String> = (0..65).map(|i| format!("{{\"name\": \"x{i}\"}}")).collect();
    let text = format!(
        "{{\"variables\": [{}], \"energy\": \"x0^2\"}}",
        vars.join(",")
    );
    check("too_many_unknowns", &text)
        .bad_input()
        .error_line("the spec has 65 unknowns; the limit is 64")
        .any_hint();
    let comps: Vec<String> = (0..1001)
        .map(|i| format!("{{\"weight\": 1, \"mean\": [{i}], \"sd\": [1]}}"))
        .collect();
    let text = format!("{{\"mixture\": [{}]}}", comps.join(","));
    check("too_many_components", &text)
        .bad_input()
        .error_line("the mixture has 1001 components; the limit is 1000");
}

// ---------------------------------------------------------------------------------------------
// Mixture targets.

#[test]
fn mixture_covariance_not_positive_definite() {
    check(
        "mixture_not_pd",
        r#"{"mixture": [{"weight": 1, "mean": [0, 0], "sd": [1, 1]}, {"weight": 2, "mean": [3, 0], "cov": [[1, 2], [2, 1]]}]}"#,
    )
    .bad_input()
    .error_line("mixture component 2: the covariance is not positive definite")
    .hint("strictly between −1 and 1");
    check(
        "mixture_singular",
        r#"{"mixture": [{"weight": 1, "mean": [0, 0], "cov": [[1, 1], [1, 1]]}]}"#,
    )
    .bad_input()
    .error_line("not positive definite")
    .any_hint();
}

#[test]
fn mixture_non_positive_weight() {
    check(
        "mixture_weight_zero",
        r#"{"mixture": [{"weight": 1, "mean": [0, 0], "sd": [1, 1]}, {"weight": 0, "mean": [1, 1], "sd": [1, 1]}]}"#,
    )
    .bad_input()
    .error_line("mixture component 2 has weight 0; weights must be positive")
    .hint("positive weight");
    check(
        "mixture_weight_negative",
        r#"{"mixture": [{"weight": -2, "mean": [0], "sd": [1]}]}"#,
    )
    .bad_input()
    .error_line("mixture component 1 has weight -2")
    .any_hint();
}

#[test]
fn mixture_dimension_mismatch() {
    check(
        "mixture_dimensions",
        r#"{"mixture": [{"weight": 1, "mean": [0, 0], "sd": [1, 1]}, {"weight": 1, "mean": [1, 1, 1], "sd": [1, 1, 1]}]}"#,
    )
    .bad_input()
    .error_line("mixture component 2 has a mean of length 3 but component 1 has 2")
    .hint("one mean value per unknown");
    check(
        "mixture_sd_length",
        r#"{"mixture": [{"weight": 1, "mean": [0, 0], "sd": [1]}]}"#,
    )
    .bad_input()
    .error_line("mixture component 1 has 1 standard deviations for dimension 2")
    .any_hint();
    check(
        "mixture_cov_shape",
        r#"{"mixture": [{"weight": 1, "mean": [0, 0], "cov": [[1, 0]]}]}"#,
    )
    .bad_input()
    .error_line("the covariance must be 2 × 2")
    .any_hint();
    check(
        "mixture_variable_count",
        r#"{"variables": [{"name": "a"}], "mixture": [{"weight": 1, "mean": [0, 0], "sd": [1, 1]}]}"#,
    )
    .bad_input()
    .error_line("the mixture has dimension 2 but 1 variables are named")
    .any_hint();
}

#[test]
fn mixture_with_both_cov_and_sd() {
    check(
        "mixture_cov_and_sd",
        r#"{"mixture": [{"weight": 1, "mean": [0, 0], "sd": [1, 1], "cov": [[1, 0], [0, 1]]}]}"#,
    )
    .bad_input()
    .error_line("mixture component 1 gives both \"cov\" and \"sd\"")
    .hint("keep one");
    check(
        "mixture_neither",
        r#"{"mixture": [{"weight": 1, "mean": [0]}]}"#,
    )
    .bad_input()
    .error_line("has neither \"cov\" nor \"sd\"")
    .any_hint();
}

#[test]
fn mixture_with_bounds() {
    check(
        "mixture_bounds",
        r#"{"variables": [{"name": "a", "lower": 0}, {"name": "b"}], "mixture": [{"weight": 1, "mean": [1, 0], "sd": [1, 1]}]}"#,
    )
    .bad_input()
    .error_line("variable `a` has bounds, but a mixture target is unbounded")
    .hint("remove the bounds");
}

#[test]
fn other_mixture_faults() {
    check("mixture_empty", r#"{"mixture": []}"#)
        .bad_input()
        .error_line("the mixture has no components")
        .any_hint();
    check(
        "mixture_empty_mean",
        r#"{"mixture": [{"weight": 1, "mean": [], "sd": []}]}"#,
    )
    .bad_input()
    .error_line("mixture component 1 has an empty mean")
    .any_hint();
    check(
        "mixture_negative_sd",
        r#"{"mixture": [{"weight": 1, "mean": [0, 0], "sd": [1, -1]}]}"#,
    )
    .bad_input()
    .error_line("mixture component 1 has standard deviation -1")
    .hint("positive");
    check(
        "mixture_asymmetric",
        r#"{"mixture": [{"weight": 1, "mean": [0, 0], "cov": [[1, 0.5], [0.2, 1]]}]}"#,
    )
    .bad_input()
    .error_line("the covariance is not symmetric")
    .any_hint();
    check(
        "mixture_with_data",
        r#"{"data": {"a": [1]}, "mixture": [{"weight": 1, "mean": [0], "sd": [1]}]}"#,
    )
    .bad_input()
    .error_line("a mixture target takes no data")
    .any_hint();
}

// ---------------------------------------------------------------------------------------------
// Densities that cannot be used.

#[test]
fn energy_non_finite_at_every_start() {
    check("nowhere_finite", &energy_spec(X, None, "log(-1 - x^2)"))
        .bad_input()
        .error_line("the energy is not finite at any of the")
        .unlocated()
        .hint("domain");
    check("nan_everywhere", &energy_spec(X, None, "0/0 + x^2"))
        .bad_input()
        .error_line("not finite")
        .any_hint();
}

#[test]
fn infinite_density_at_a_point() {
    check("log_abs", &energy_spec(X, None, "log(abs(x))"))
        .bad_input()
        .error_line("the energy is −∞ (infinite density)")
        .hint("log(0)");
}

#[test]
fn constant_energy_on_an_unbounded_unknown_is_improper() {
    check("energy_zero", &energy_spec(X, None, "0"))
        .bad_input()
        .error_line("does not seem to be normalisable along `x`")
        .unlocated()
        .hint("bound `x`");
}

#[test]
fn falling_energies_are_improper() {
    check("energy_minus_x_squared", &energy_spec(X, None, "-x^2"))
        .bad_input()
        .error_line("normalisable along `x`")
        .any_hint();
    check("energy_exp", &energy_spec(X, None, "exp(x)"))
        .bad_input()
        .error_line("normalisable along `x`")
        .any_hint();
    check(
        "log_density_x",
        r#"{"variables": [{"name": "x"}], "log_density": "x"}"#,
    )
    .bad_input()
    .error_line("normalisable along `x`")
    .any_hint();
}

#[test]
fn falling_energy_on_a_half_line_is_improper() {
    check(
        "minus_x_lower_0",
        &energy_spec(r#"[{"name": "x", "lower": 0}]"#, None, "-x"),
    )
    .bad_input()
    .error_line("does not seem to be normalisable along `x`")
    .hint("bound `x`");
}

#[test]
fn rising_energy_towards_minus_infinity_below_an_upper_bound_is_improper() {
    check(
        "x_upper_0",
        &energy_spec(r#"[{"name": "x", "upper": 0}]"#, None, "x"),
    )
    .bad_input()
    .error_line("normalisable along `x`")
    .any_hint();
}

#[test]
fn constant_energy_on_a_half_line_is_improper() {
    check(
        "zero_lower_0",
        &energy_spec(r#"[{"name": "s", "lower": 0}]"#, None, "0"),
    )
    .bad_input()
    .error_line("normalisable along `s`")
    .hint("bound `s`");
}

#[test]
fn density_flat_along_one_unknown_names_it() {
    check(
        "flat_along_y",
        &energy_spec(r#"[{"name": "x"}, {"name": "y"}]"#, None, "0.5 * x^2"),
    )
    .bad_input()
    .error_line("does not seem to be normalisable along `y`")
    .hint("bound `y`");
    check(
        "flat_along_alpha",
        &energy_spec(
            r#"[{"name": "alpha"}, {"name": "beta"}]"#,
            None,
            "0.5 * (beta - 1)^2",
        ),
    )
    .bad_input()
    .error_line("normalisable along `alpha`")
    .hint("bound `alpha`");
    check(
        "flat_along_b_of_three",
        &energy_spec(
            r#"[{"name": "a"}, {"name": "b"}, {"name": "c"}]"#,
            None,
            "0.5 * a^2 + 0.5 * (c - 1)^2",
        ),
    )
    .bad_input()
    .error_line("normalisable along `b`")
    .hint("bound `b`");
    check(
        "flat_along_b_other_bounded",
        &energy_spec(
            r#"[{"name": "a", "lower": 0, "upper": 1}, {"name": "b"}]"#,
            None,
            "0.5 * a^2",
        ),
    )
    .bad_input()
    .error_line("normalisable along `b`")
    .any_hint();
}

#[test]
fn density_flat_along_a_half_bounded_unknown_names_it() {
    check(
        "flat_along_y_lower_0",
        &energy_spec(
            r#"[{"name": "x"}, {"name": "y", "lower": 0}]"#,
            None,
            "0.5 * x^2",
        ),
    )
    .bad_input()
    .error_line("normalisable along `y`")
    .hint("bound `y`");
}

#[test]
fn heavy_tailed_improper_density_is_refused() {
    check("slow_tails", &energy_spec(X, None, "0.5 * log(1 + x^2)"))
        .bad_input()
        .error_line("normalisable along `x`")
        .any_hint();
}

#[test]
fn proper_density_with_a_bounded_unknown_is_not_called_improper() {
    // The negative control of the improper-density check: T − T0 − 17 ~ N(0, 1), T0 ~ N(25, 2²),
    // T inside (−40, 85). A proper, unimodal density; kiln must accept it for every seed.
    for seed in [1, 2, 3, 4] {
        let text = format!(
            "{{\"variables\": [{{\"name\": \"T\", \"lower\": -40, \"upper\": 85}}, {{\"name\": \"T0\"}}],\n \
             \"energy\": \"0.5 * (T - T0 - 17)^2 + 0.5 * ((T0 - 25) / 2)^2\",\n \"settings\": {{\"seed\": {seed}}}}}"
        );
        let run = check(&format!("proper_bounded_seed_{seed}"), &text);
        assert!(
            !run.stderr.contains("panicked"),
            "kiln panicked\n{}",
            run.show()
        );
        assert_eq!(
            run.code,
            Some(0),
            "a proper density was refused\n{}",
            run.show()
        );
    }
}

// ---------------------------------------------------------------------------------------------
// The command line.

#[test]
fn a_file_that_does_not_exist() {
    let dir = case_dir("missing_file");
    let run = run_in(&dir, "missing_file", &["check", "no-such-spec.json"]);
    let _ = fs::remove_dir_all(&dir);
    run.bad_input()
        .error_line("cannot read `no-such-spec.json`")
        .unlocated()
        .hint("check the path");
}

#[test]
fn a_folder_instead_of_a_file() {
    let dir = case_dir("folder_as_file");
    fs::create_dir_all(dir.join("specs")).unwrap();
    let run = run_in(&dir, "folder_as_file", &["check", "specs"]);
    let _ = fs::remove_dir_all(&dir);
    run.bad_input().error_line("cannot read `specs`").any_hint();
}

#[test]
fn a_file_that_is_not_utf8() {
    check_bytes(
        "not_utf8",
        b"{\"variables\": [{\"name\": \"x\"}], \"energy\": \"x^2 \xff\"}",
    )
    .bad_input()
    .error_line("cannot read")
    .hint("UTF-8");
}

#[test]
fn an_unknown_command() {
    let dir = case_dir("unknown_command");
    let run = run_in(&dir, "unknown_command", &["chek", "spec.json"]);
    run.bad_input()
        .error_line("unknown command `chek`")
        .hint("did you mean `kiln check`?");
    let run = run_in(&dir, "unknown_command_far", &["frobnicate"]);
    let _ = fs::remove_dir_all(&dir);
    run.bad_input()
        .error_line("unknown command `frobnicate`")
        .hint("--help");
}

#[test]
fn command_line_usage_mistakes() {
    let dir = case_dir("usage");
    fs::write(
        dir.join("spec.json"),
        r#"{"variables": [{"name": "x"}], "energy": "0.5 * x^2"}"#,
    )
    .unwrap();
    run_in(&dir, "no_command", &[])
        .bad_input()
        .error_line("no command given")
        .any_hint();
    run_in(&dir, "check_without_file", &["check"])
        .bad_input()
        .error_line("exactly one spec file")
        .any_hint();
    run_in(
        &dir,
        "check_two_files",
        &["check", "spec.json", "spec.json"],
    )
    .bad_input()
    .error_line("exactly one spec file")
    .any_hint();
    run_in(&dir, "unknown_option", &["check", "--jsn", "spec.json"])
        .bad_input()
        .error_line("unknown option `--jsn`")
        .hint("--json");
    // The same spec is fine: the failures above are the command line's, not the spec's.
    let ok = run_in(&dir, "good_spec", &["check", "spec.json"]);
    let _ = fs::remove_dir_all(&dir);
    assert_eq!(ok.code, Some(0), "a good spec failed\n{}", ok.show());
}
