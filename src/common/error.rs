//! Errors that reach the user.
//!
//! Owns: the one error type of the crate, [`KilnError`], and its rendering as a labelled record
//! (`problem`, `where` with the source line and a marker under the fault, `try`).
//! Every stage returns `Result<_, KilnError>`; nothing in the crate panics on user input.
//! Must not: decide what is an error (the stages do that) or print anything itself.

use serde::Serialize;
use std::fmt;

/// A place in a piece of text the user wrote: a formula field of the spec or the spec file.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Location {
    /// What the text is: `energy`, `log_density` or the spec file's name.
    pub source: String,
    /// 1-based line number.
    pub line: usize,
    /// 1-based column, counted in characters.
    pub column: usize,
    /// The whole source line, for display.
    pub line_text: String,
    /// How many characters the caret underlines (at least one).
    pub width: usize,
}

impl Location {
    /// The location of the byte range `start..end` of `text`.
    pub fn in_text(source: &str, text: &str, start: usize, end: usize) -> Location {
        let start = floor_char_boundary(text, start.min(text.len()));
        let end = floor_char_boundary(text, end.clamp(start, text.len()));
        let line_start = text[..start].rfind('\n').map_or(0, |i| i + 1);
        let line_end = text[start..].find('\n').map_or(text.len(), |i| start + i);
        let line = text[..start].matches('\n').count() + 1;
        let column = text[line_start..start].chars().count() + 1;
        let width = text[start..end.min(line_end)].chars().count().max(1);
        Location {
            source: source.to_string(),
            line,
            column,
            line_text: text[line_start..line_end]
                .trim_end_matches('\r')
                .to_string(),
            width,
        }
    }

    /// A location given as 1-based line and column (as JSON parsers report it).
    pub fn at_line_column(source: &str, text: &str, line: usize, column: usize) -> Location {
        let line_text = text
            .lines()
            .nth(line.saturating_sub(1))
            .unwrap_or("")
            .to_string();
        Location {
            source: source.to_string(),
            line: line.max(1),
            column: column.max(1),
            line_text,
            width: 1,
        }
    }
}

fn floor_char_boundary(text: &str, mut i: usize) -> usize {
    while i > 0 && !text.is_char_boundary(i) {
        i -= 1;
    }
    i
}

/// What kind of failure this is; the command line maps every kind to exit code 2.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum ErrorKind {
    /// The spec file is not valid JSON or has the wrong shape.
    Spec,
    /// A formula does not parse or names something unknown.
    Formula,
    /// The density itself is unusable: non-finite everywhere, improper, no mode.
    Density,
    /// A size limit was exceeded.
    Limit,
    /// A command-line usage mistake or an unreadable file.
    Usage,
}

/// An error for the user, with where it happened and how to fix it.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct KilnError {
    pub kind: ErrorKind,
    pub message: String,
    /// Where in the user's text; `None` when the fault is not in one place.
    pub location: Option<Box<Location>>,
    /// How to fix it.
    pub hint: Option<String>,
}

impl KilnError {
    pub fn new(kind: ErrorKind, message: impl Into<String>) -> KilnError {
        KilnError {
            kind,
            message: message.into(),
            location: None,
            hint: None,
        }
    }
    pub fn spec(message: impl Into<String>) -> KilnError {
        KilnError::new(ErrorKind::Spec, message)
    }
    pub fn density(message: impl Into<String>) -> KilnError {
        KilnError::new(ErrorKind::Density, message)
    }
    pub fn limit(message: impl Into<String>) -> KilnError {
        KilnError::new(ErrorKind::Limit, message)
    }
    pub fn usage(message: impl Into<String>) -> KilnError {
        KilnError::new(ErrorKind::Usage, message)
    }
    pub fn at(mut self, location: Location) -> KilnError {
        self.location = Some(Box::new(location));
        self
    }
    pub fn with_hint(mut self, hint: impl Into<String>) -> KilnError {
        self.hint = Some(hint.into());
        self
    }

    /// The error as a small labelled record of plain text, the same on the command line and in
    /// the page:
    ///
    /// ```text
    /// problem  unknown function `lgama`
    /// where    energy, line 2, column 3
    ///            lgama(k + 1) - k * log(rate)
    ///            ‾‾‾‾‾
    /// try      did you mean `lgamma`?
    /// ```
    ///
    /// Each label sits in a column of [`LABEL_WIDTH`] characters; the source line follows the
    /// `where` line, indented by the same column, and the marker line under it overlines the
    /// faulty characters with `‾`. A long line is shown as a window around the fault.
    pub fn render(&self) -> String {
        let mut out = labelled("problem", &self.message);
        if let Some(loc) = &self.location {
            out.push_str(&labelled(
                "where",
                &format!("{}, line {}, column {}", loc.source, loc.line, loc.column),
            ));
            let (shown, lead, width) = window(loc);
            let pad = " ".repeat(LABEL_WIDTH);
            out.push_str(&format!("{pad}{shown}\n"));
            out.push_str(&format!(
                "{pad}{lead}{}\n",
                MARKER.to_string().repeat(width)
            ));
        }
        if let Some(hint) = &self.hint {
            out.push_str(&labelled("try", hint));
        }
        out
    }
}

/// Width of the label column of a rendered error (`problem`, `where`, `try`).
pub const LABEL_WIDTH: usize = 9;
/// The character that marks the fault, under the source line.
pub const MARKER: char = '‾';

/// `label` padded to the label column, then `text`; further lines of `text` are indented.
fn labelled(label: &str, text: &str) -> String {
    let pad = " ".repeat(LABEL_WIDTH);
    let mut out = String::new();
    for (i, line) in text.lines().enumerate() {
        if i == 0 {
            out.push_str(&format!("{label:<LABEL_WIDTH$}{line}\n"));
        } else {
            out.push_str(&format!("{pad}{line}\n"));
        }
    }
    if text.is_empty() {
        out.push_str(&format!("{label}\n"));
    }
    out
}

/// The part of the source line to show, the blanks (tabs kept) before the fault, and the
/// marker's width. Lines longer than 160 characters are cut to 70 either side of the fault.
fn window(loc: &Location) -> (String, String, usize) {
    const WINDOW: usize = 70;
    const WHOLE: usize = 160;
    let chars: Vec<char> = loc.line_text.chars().collect();
    let col = (loc.column - 1).min(chars.len());
    let long = chars.len() > WHOLE;
    let from = if long { col.saturating_sub(WINDOW) } else { 0 };
    let width = if long {
        loc.width.min(WINDOW)
    } else {
        loc.width
    };
    let to = if long {
        (col + width + WINDOW).min(chars.len())
    } else {
        chars.len()
    };
    let mut shown: String = chars[from..to].iter().collect();
    let mut lead_chars: Vec<char> = chars[from..col].to_vec();
    if from > 0 {
        shown.insert(0, '…');
        lead_chars.insert(0, ' ');
    }
    if to < chars.len() {
        shown.push('…');
    }
    // Tabs in the line keep their width over the marker.
    let lead: String = lead_chars
        .iter()
        .map(|&c| if c == '\t' { '\t' } else { ' ' })
        .collect();
    (shown, lead, width.max(1))
}

impl fmt::Display for KilnError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.render())
    }
}

impl std::error::Error for KilnError {}

/// The closest of `candidates` to `name` by edit distance, if it is plausibly a misspelling.
pub fn nearest<'a>(name: &str, candidates: impl IntoIterator<Item = &'a str>) -> Option<&'a str> {
    let mut best: Option<(&str, usize)> = None;
    for c in candidates {
        let d = edit_distance(&name.to_lowercase(), &c.to_lowercase());
        if best.is_none_or(|(_, bd)| d < bd) {
            best = Some((c, d));
        }
    }
    let (c, d) = best?;
    let allowed = match name.chars().count() {
        0..=2 => 1,
        3..=5 => 2,
        _ => 3,
    };
    (d <= allowed).then_some(c)
}

/// Levenshtein distance, with a transposition of neighbours counting as one edit.
pub fn edit_distance(a: &str, b: &str) -> usize {
    let a: Vec<char> = a.chars().collect();
    let b: Vec<char> = b.chars().collect();
    let mut d = vec![vec![0usize; b.len() + 1]; a.len() + 1];
    for (i, row) in d.iter_mut().enumerate() {
        row[0] = i;
    }
    for j in 0..=b.len() {
        d[0][j] = j;
    }
    for i in 1..=a.len() {
        for j in 1..=b.len() {
            let cost = usize::from(a[i - 1] != b[j - 1]);
            let mut v = (d[i - 1][j] + 1)
                .min(d[i][j - 1] + 1)
                .min(d[i - 1][j - 1] + cost);
            if i > 1 && j > 1 && a[i - 1] == b[j - 2] && a[i - 2] == b[j - 1] {
                v = v.min(d[i - 2][j - 2] + 1);
            }
            d[i][j] = v;
        }
    }
    d[a.len()][b.len()]
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn caret_sits_under_the_fault() {
        let text = "let a = x;\nlgama(a) + 1";
        let loc = Location::in_text("energy", text, 11, 16);
        assert_eq!((loc.line, loc.column, loc.width), (2, 1, 5));
        let e = KilnError::new(ErrorKind::Formula, "unknown function `lgama`")
            .at(loc)
            .with_hint("did you mean `lgamma`?");
        let r = e.render();
        assert_eq!(
            r,
            "problem  unknown function `lgama`\n\
             where    energy, line 2, column 1\n         \
             lgama(a) + 1\n         \
             ‾‾‾‾‾\n\
             try      did you mean `lgamma`?\n"
        );
    }

    #[test]
    fn the_marker_keeps_tabs_and_long_lines_are_windowed() {
        let text = "\tx +\tfoo";
        let loc = Location::in_text("energy", text, 5, 8);
        let r = KilnError::new(ErrorKind::Formula, "unknown name `foo`")
            .at(loc)
            .render();
        let lines: Vec<&str> = r.lines().collect();
        assert_eq!(lines[2], "         \tx +\tfoo");
        assert_eq!(lines[3], "         \t   \t‾‾‾");
        // A line of 400 characters is cut around the fault, which stays marked.
        let long = format!("{}bad{}", "a + ".repeat(50), " + b".repeat(50));
        let at = long.find("bad").unwrap();
        let loc = Location::in_text("energy", &long, at, at + 3);
        let r = KilnError::new(ErrorKind::Formula, "x").at(loc).render();
        let lines: Vec<&str> = r.lines().collect();
        assert!(
            lines[2].starts_with("         …") && lines[2].ends_with('…'),
            "{r}"
        );
        let marker = lines[3].chars().position(|c| c == '‾').unwrap();
        let above: String = lines[2].chars().skip(marker).take(3).collect();
        assert_eq!(above, "bad", "{r}");
        // Without a place, only the problem and the suggestion.
        let r = KilnError::usage("no command given")
            .with_hint("try `kiln --help`")
            .render();
        assert_eq!(r, "problem  no command given\ntry      try `kiln --help`\n");
    }

    #[test]
    fn nearest_name_finds_misspellings_only() {
        let names = ["lgamma", "log", "log1p", "exp"];
        assert_eq!(nearest("lgama", names), Some("lgamma"));
        assert_eq!(nearest("expp", names), Some("exp"));
        assert_eq!(nearest("banana", names), None);
        assert_eq!(edit_distance("ab", "ba"), 1);
    }
}
