//! Data as CSV text → named numeric columns, through the `csv` crate (the page and the command
//! line read data the same way).
//!
//! Owns: [`read_csv`]: RFC 4180 quoting, CRLF or LF line ends, a byte-order mark, the delimiter
//! (`,`, `;` or tab, taken from the header row), the header row naming the columns, and the
//! errors for a bad header, a row of the wrong length, an empty or non-numeric cell (each with
//! the data row, the line and the column, and a caret under the cell), and the size limits.
//! Must not: check what the columns are used for (the formula does that) or know the page.

use crate::common::error::{ErrorKind, KilnError, Location};
use crate::formula::resolve::{is_identifier, reserved_names};

/// Largest CSV text accepted, in bytes (the same as a whole spec file). A larger text is
/// refused at once with a limit error; nothing of it is read.
pub const MAX_CSV_BYTES: usize = 64 * 1024 * 1024;

/// The source name of the data in messages (`--> data, line 3, column 5`).
pub const DATA_SOURCE: &str = "data";

/// The delimiter: a tab if the header row has one; a semicolon if it has one and no comma;
/// otherwise a comma.
fn delimiter(text: &str) -> u8 {
    let first = text.lines().find(|l| !l.trim().is_empty()).unwrap_or("");
    if first.contains('\t') {
        b'\t'
    } else if first.contains(';') && !first.contains(',') {
        b';'
    } else {
        b','
    }
}

/// The byte range of field `j` of the record that starts at byte `start`, scanning the raw
/// text (quotes respected), for the caret under a cell.
fn field_range(text: &str, start: usize, j: usize, delim: u8) -> (usize, usize) {
    let b = text.as_bytes();
    let (mut i, mut field, mut quoted) = (start, 0, false);
    let mut field_start = start;
    while i < b.len() {
        let c = b[i];
        if quoted {
            if c == b'"' {
                if b.get(i + 1) == Some(&b'"') {
                    i += 1;
                } else {
                    quoted = false;
                }
            }
        } else if c == b'"' {
            quoted = true;
        } else if c == delim || c == b'\n' || c == b'\r' {
            if field == j {
                return trim_range(text, field_start, i);
            }
            if c != delim {
                break;
            }
            field += 1;
            field_start = i + 1;
        }
        i += 1;
    }
    if field == j {
        trim_range(text, field_start, i.min(b.len()))
    } else {
        (start, start)
    }
}

fn trim_range(text: &str, a: usize, b: usize) -> (usize, usize) {
    let s = &text[a..b];
    let lead = s.len() - s.trim_start().len();
    let t = s.trim();
    (a + lead, a + lead + t.len())
}

/// A number as the data may hold it: decimal, optionally signed, with an optional exponent
/// (`3`, `-2.5`, `.5`, `1e-3`); finite. (Rust's own parser would also take `inf` and `NaN`.)
pub fn parse_cell(t: &str) -> Option<f64> {
    let s = t.strip_prefix(['+', '-']).unwrap_or(t);
    let (mantissa, exponent) = match s.find(['e', 'E']) {
        Some(i) => (&s[..i], Some(&s[i + 1..])),
        None => (s, None),
    };
    let digits = mantissa.bytes().filter(|c| c.is_ascii_digit()).count();
    let points = mantissa.bytes().filter(|&c| c == b'.').count();
    if digits == 0 || points > 1 || digits + points != mantissa.len() {
        return None;
    }
    if let Some(e) = exponent {
        let e = e.strip_prefix(['+', '-']).unwrap_or(e);
        if e.is_empty() || !e.bytes().all(|c| c.is_ascii_digit()) {
            return None;
        }
    }
    t.parse::<f64>().ok().filter(|v| v.is_finite())
}

fn err_at(text: &str, range: (usize, usize), message: String, hint: &str) -> KilnError {
    KilnError::new(ErrorKind::Spec, message)
        .at(Location::in_text(DATA_SOURCE, text, range.0, range.1))
        .with_hint(hint)
}

/// Reads CSV text with a header row into named columns, in the order of the header.
/// `max_cells` bounds rows × columns (reading stops with an error as soon as it is passed).
pub fn read_csv(text: &str, max_cells: usize) -> Result<Vec<(String, Vec<f64>)>, KilnError> {
    if text.len() > MAX_CSV_BYTES {
        return Err(KilnError::limit(format!(
            "the data is {} bytes of CSV; the limit is {MAX_CSV_BYTES} bytes (64 MiB)",
            text.len()
        ))
        .with_hint("thin or aggregate the data (for example into counts per bin)"));
    }
    // A byte-order mark (as spreadsheets write it) is not part of the first column's name.
    let text = text.strip_prefix('\u{feff}').unwrap_or(text);
    let delim = delimiter(text);
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(false)
        .flexible(true)
        .trim(csv::Trim::All)
        .delimiter(delim)
        .from_reader(text.as_bytes());
    let mut names: Vec<String> = Vec::new();
    let mut columns: Vec<Vec<f64>> = Vec::new();
    let mut record = csv::StringRecord::new();
    let mut header_seen = false;
    let mut cells = 0usize;
    let mut row = 0usize;
    // The 1-based line of the current record, and the byte up to which its line ends are counted.
    let mut line = 1usize;
    let mut counted_to = 0usize;
    loop {
        let ok = reader.read_record(&mut record).map_err(|e| {
            let (line, byte) = e
                .position()
                .map_or((1, 0), |p| (p.line() as usize, p.byte() as usize));
            let message = match e.kind() {
                csv::ErrorKind::Utf8 { .. } => "the data is not valid UTF-8 text".to_string(),
                _ => format!("the data cannot be read as CSV at line {line}"),
            };
            err_at(
                text,
                (byte, byte + 1),
                message,
                "save the data as CSV text (UTF-8) with a header row",
            )
        })?;
        if !ok {
            break;
        }
        // Where the record starts (past the line end of the one before, which the reader may
        // count as part of this record's position after a CR LF), and its 1-based line.
        let mut start = record.position().map_or(0, |p| p.byte() as usize);
        while matches!(text.as_bytes().get(start), Some(b'\r' | b'\n')) {
            start += 1;
        }
        // Counted on from the record before (records start in order): linear in the text.
        let upto = start.min(text.len());
        if upto > counted_to {
            line += text.as_bytes()[counted_to..upto]
                .iter()
                .filter(|&&b| b == b'\n')
                .count();
            counted_to = upto;
        }
        // A line of nothing but delimiters and spaces is a blank line (spreadsheets write them
        // below the data); an empty quoted field `""` is a cell.
        let line_end = text[start..].find('\n').map_or(text.len(), |i| start + i);
        if record.iter().all(|f| f.is_empty()) && !text[start..line_end].contains('"') {
            continue;
        }
        if !header_seen {
            header_seen = true;
            for (j, name) in record.iter().enumerate() {
                let range = field_range(text, start, j, delim);
                if name.is_empty() {
                    return Err(err_at(
                        text,
                        range,
                        format!("column {} of the header row has no name", j + 1),
                        "the first row names the columns, as in `y,group`",
                    ));
                }
                if !is_identifier(name) {
                    return Err(err_at(
                        text,
                        range,
                        format!("the column name `{name}` is not a valid name"),
                        "use letters, digits and `_`, starting with a letter or `_`; the first row must name the columns",
                    ));
                }
                if reserved_names().any(|r| r == name) {
                    return Err(err_at(
                        text,
                        range,
                        format!("the column name `{name}` is reserved: it is a built-in function or constant"),
                        &format!("rename the column, for example `{name}_`"),
                    ));
                }
                if names.iter().any(|n| n == name) {
                    return Err(err_at(
                        text,
                        range,
                        format!("the column name `{name}` appears twice"),
                        "give every column its own name",
                    ));
                }
                names.push(name.to_string());
            }
            columns = vec![Vec::new(); names.len()];
            continue;
        }
        row += 1;
        if record.len() != names.len() {
            let end = text[start..].find('\n').map_or(text.len(), |i| start + i);
            return Err(err_at(
                text,
                (start, end),
                format!(
                    "data row {row} (line {line}) has {} value{}, the header has {}",
                    record.len(),
                    if record.len() == 1 { "" } else { "s" },
                    names.len()
                ),
                "give every row one value per column, separated like the header",
            ));
        }
        cells += names.len();
        if cells > max_cells {
            return Err(KilnError::limit(format!(
                "the data has more than {max_cells} cells (rows × columns)"
            ))
            .with_hint("thin or aggregate the data (for example into counts per bin)"));
        }
        for (j, cell) in record.iter().enumerate() {
            // Only an error needs the cell's place in the text.
            let range = || field_range(text, start, j, delim);
            if cell.is_empty() {
                return Err(err_at(
                    text,
                    range(),
                    format!(
                        "data row {row} (line {line}), column `{}`: the cell is empty",
                        names[j]
                    ),
                    "every cell needs a number; remove the row or fill it in",
                ));
            }
            match parse_cell(cell) {
                Some(v) => columns[j].push(v),
                None => {
                    let shown: String = cell.chars().take(40).collect();
                    return Err(err_at(
                        text,
                        range(),
                        format!(
                            "data row {row} (line {line}), column `{}`: `{shown}` is not a number",
                            names[j]
                        ),
                        "write numbers as in 3, -2.5 or 1e-3 (a point for decimals, no thousands separators); JSON-style NaN and Infinity are not numbers",
                    ));
                }
            }
        }
    }
    if names.is_empty() {
        return Err(KilnError::spec("the data CSV is empty")
            .with_hint("give a header row naming the columns, then one row per observation"));
    }
    if row == 0 {
        return Err(
            KilnError::spec("the data CSV has a header row but no rows of data")
                .with_hint("add one row per observation below the header"),
        );
    }
    Ok(names.into_iter().zip(columns).collect())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn read(t: &str) -> Result<Vec<(String, Vec<f64>)>, KilnError> {
        read_csv(t, 1_000_000)
    }

    #[test]
    fn quoting_line_ends_bom_and_delimiters() {
        let c = read("\u{feff}y,\"group\"\r\n1.5,\"2\"\r\n-3e-1,1\r\n").unwrap();
        let e = read("a,b\r\n1,2\r\n\r\n3,x\r\n").unwrap_err();
        assert_eq!(
            e.message,
            "data row 2 (line 4), column `b`: `x` is not a number"
        );
        assert_eq!(e.location.unwrap().line, 4);
        assert_eq!(c[0], ("y".to_string(), vec![1.5, -0.3]));
        assert_eq!(c[1], ("group".to_string(), vec![2.0, 1.0]));
        let c = read("a;b\n1;2\n\n3;4\n").unwrap();
        assert_eq!(c[1].1, vec![2.0, 4.0]);
        let c = read("a\tb\n 1 \t2\n").unwrap();
        assert_eq!(c[0].1, vec![1.0]);
        // A quoted field may hold the delimiter and a doubled quote.
        let e = read("a,b\n\"1,5\",2\n").unwrap_err();
        assert!(e.message.contains("`1,5` is not a number"), "{}", e.message);
    }

    #[test]
    fn lines_counted_on_from_record_to_record() {
        // 3000 rows with CR LF ends, a blank line every 7 rows and a quoted field over two
        // lines; the bad cell's line is counted here by hand from the text.
        let mut t = String::from("a,b\r\n");
        for i in 0..3000 {
            if i % 7 == 3 {
                t.push_str("\r\n");
            }
            t.push_str(&format!("{i},{}\r\n", i % 5));
        }
        t.push_str("\"x\ny\",2\r\n");
        let Err(e) = read(&t) else {
            panic!("the bad cell was read")
        };
        let line = t.bytes().filter(|&b| b == b'\n').count() - 1;
        assert_eq!(e.location.unwrap().line, line);
        assert_eq!(
            e.message,
            format!("data row 3001 (line {line}), column `a`: `x\ny` is not a number")
        );
    }

    #[test]
    fn errors_name_the_row_the_line_and_the_column() {
        let e = read("a,b\n1,2\n3,x\n").unwrap_err();
        assert_eq!(
            e.message,
            "data row 2 (line 3), column `b`: `x` is not a number"
        );
        let loc = e.location.unwrap();
        assert_eq!((loc.line, loc.column, loc.width), (3, 3, 1));
        let e = read("a,b\n1,\n").unwrap_err();
        assert_eq!(
            e.message,
            "data row 1 (line 2), column `b`: the cell is empty"
        );
        let e = read("a,b\n1\n").unwrap_err();
        assert!(e.message.contains("has 1 value, the header has 2"));
        let e = read("a,a\n1,2\n").unwrap_err();
        assert!(e.message.contains("appears twice"));
        let e = read("1a,b\n1,2\n").unwrap_err();
        assert!(e.message.contains("not a valid name"));
        let e = read("x,exp\n1,2\n").unwrap_err();
        assert!(e.message.contains("reserved"));
        for bad in ["NaN", "inf", "1e", "1.2.3", "0x10", "1,000"] {
            assert_eq!(parse_cell(bad), None, "{bad}");
        }
        assert_eq!(parse_cell("+.5e2"), Some(50.0));
        let e = read_csv("a\n1\n2\n3\n", 2).unwrap_err();
        assert_eq!(e.kind, ErrorKind::Limit);
        assert!(read("").is_err());
        assert!(read("a,b\n").unwrap_err().message.contains("no rows"));
        // Lines of delimiters are blank; a quoted empty field is an empty cell.
        assert_eq!(read("a,b\n1,2\n,\n , \n").unwrap()[0].1, vec![1.0]);
        let e = read("a\n1\n\"\"\n").unwrap_err();
        assert!(e.message.contains("the cell is empty"), "{}", e.message);
    }
}
