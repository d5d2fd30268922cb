//! Reads a return window from CSV: a header row, period labels in the first
//! column, one factor per other column (decimal returns), an optional market
//! column, and `NA` or an empty cell for a missing value. Errors name the
//! file's line and column (both one-based, as an editor shows them).

use std::fmt;
use std::path::Path;

use thiserror::Error;

use crate::estimator::error::truncate_for_display;
use crate::estimator::window::MAX_PREVIOUS_WEIGHT;
use crate::estimator::{Location, ReturnPanel, window::parse_period};

/// A problem in a CSV file, at a line and column.
#[derive(Clone, Debug, Error, PartialEq)]
#[error("{file}: line {line}, column {column}{}: {message}", header.as_ref().map(|h| format!(" (\"{h}\")")).unwrap_or_default())]
pub struct CsvError {
    /// File name as given.
    pub file: String,
    /// One-based line (the header is line 1).
    pub line: usize,
    /// One-based column (the period column is column 1).
    pub column: usize,
    /// Header of the column, when known.
    pub header: Option<String>,
    /// What is wrong.
    pub message: String,
}

/// A window read from a CSV file, with the map back to file positions.
#[derive(Clone, Debug)]
pub struct CsvPanel {
    /// The window.
    pub panel: ReturnPanel,
    /// File name as given.
    pub file: String,
    /// For each factor, its one-based column in the file.
    pub factor_columns: Vec<usize>,
    /// One-based column of the market, if any.
    pub market_column: Option<usize>,
}

impl CsvPanel {
    /// Describes an estimator [`Location`] as a file position, when it names a
    /// row or column of the returns or the market.
    pub fn position(&self, at: &Location) -> Option<String> {
        let line = at.row.map(|r| r + 2);
        let column = match at.field {
            "returns" | "factor_names" => at.column.and_then(|c| self.factor_columns.get(c).copied()),
            "market_returns" => self.market_column,
            "period_labels" => Some(1),
            _ => None,
        };
        match (line, column) {
            (Some(l), Some(c)) => Some(format!("{}: line {l}, column {c}", self.file)),
            (Some(l), None) => Some(format!("{}: line {l}", self.file)),
            (None, Some(c)) => Some(format!("{}: line 1, column {c}", self.file)),
            (None, None) => None,
        }
    }
}

impl fmt::Display for CsvPanel {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{} ({} periods × {} factors)", self.file, self.panel.rows, self.panel.cols)
    }
}

/// The records of CSV text (RFC 4180 through the `csv` crate), each with its
/// one-based line; blank lines are skipped and fields trimmed.
fn records(text: &str, file: &str) -> Result<Vec<(usize, Vec<String>)>, CsvError> {
    let text = text.strip_prefix('\u{feff}').unwrap_or(text);
    let mut reader =
        csv::ReaderBuilder::new().has_headers(false).flexible(true).trim(csv::Trim::All).from_reader(text.as_bytes());
    // Lines from byte offsets: the reader counts neither the blank lines it
    // skips nor them in a record's start, so step over them here.
    // Records come in order, so newlines are counted once from the last
    // record's offset (linear in the file, not quadratic).
    let bytes = text.as_bytes();
    let mut counted = (0usize, 1usize);
    let mut line_at = |p: Option<&csv::Position>| {
        let mut byte = p.map_or(0, |p| p.byte() as usize).min(bytes.len());
        while byte < bytes.len() && matches!(bytes[byte], b'\n' | b'\r') {
            byte += 1;
        }
        let (from, line) = if byte >= counted.0 { counted } else { (0, 1) };
        let now = line + bytes[from..byte].iter().filter(|&&b| b == b'\n').count();
        counted = (byte, now);
        now
    };
    let mut out = Vec::new();
    for record in reader.records() {
        let record =
            record.map_err(|e| err(file, line_at(e.position()), 1, None, format!("unreadable record: {e}")))?;
        let line = line_at(record.position());
        if record.iter().all(str::is_empty) {
            continue;
        }
        out.push((line, record.iter().map(str::to_owned).collect()));
    }
    Ok(out)
}

fn err(file: &str, line: usize, column: usize, header: Option<&str>, message: impl Into<String>) -> CsvError {
    CsvError {
        file: file.to_owned(),
        line,
        column,
        header: header.map(|h| crate::estimator::error::truncate_for_display(h).into_owned()),
        message: message.into(),
    }
}

/// Parses a cell: a decimal number, or missing (`NA`, `NaN` or empty).
fn parse_cell(cell: &str) -> Result<f64, &'static str> {
    if cell.is_empty() || cell.eq_ignore_ascii_case("na") || cell.eq_ignore_ascii_case("nan") {
        return Ok(f64::NAN);
    }
    match cell.parse::<f64>() {
        Ok(v) if v.is_finite() => Ok(v),
        Ok(_) => Err("is not a finite number (±inf is never accepted)"),
        Err(_) => Err("is not a number"),
    }
}

/// Reads a window from CSV text. `market` names the market column, if any.
///
/// # Errors
/// A [`CsvError`] naming the line and column of the first problem.
pub fn parse_returns(text: &str, file: &str, market: Option<&str>) -> Result<CsvPanel, CsvError> {
    let mut rows = records(text, file)?.into_iter();
    let Some((hline, header)) = rows.next() else {
        return Err(err(file, 1, 1, None, "the file is empty; expected a header row"));
    };
    check_header_width(file, hline, &header)?;
    let market_column = match market {
        Some(m) => Some(market_column(file, hline, &header, m)?),
        None => None,
    };
    let (names, factor_columns) = factor_columns(file, hline, &header, market_column)?;
    let body = read_body(file, &header, market_column, rows)?;
    Ok(CsvPanel {
        panel: ReturnPanel {
            cols: names.len(),
            factor_names: names,
            rows: body.labels.len(),
            period_labels: body.labels,
            returns: body.values,
            market: body.market,
            previous_weights: Vec::new(),
            market_name: market.map(str::to_owned),
        },
        file: file.to_owned(),
        factor_columns,
        market_column,
    })
}

/// A header of one column cannot hold a period and a factor; when that one
/// column holds semicolons or tabs, the file has another delimiter.
fn check_header_width(file: &str, hline: usize, header: &[String]) -> Result<(), CsvError> {
    if header.len() >= 2 {
        return Ok(());
    }
    let only = header.first().map_or("", String::as_str);
    let hint = match [(';', "semicolons"), ('\t', "tabs")].iter().find(|(c, _)| only.contains(*c)) {
        Some((_, name)) => format!(
            "; the header holds {name}: the file is read as comma-separated, so save it with commas \
             (decimal points, not decimal commas)"
        ),
        None => String::new(),
    };
    Err(err(file, hline, 1, None, format!("the header needs a period column and at least one factor column{hint}")))
}

/// The one-based column named `market`, or an error listing the columns.
fn market_column(file: &str, hline: usize, header: &[String], market: &str) -> Result<usize, CsvError> {
    header.iter().skip(1).position(|h| h == market).map(|i| i + 2).ok_or_else(|| {
        let columns: Vec<&str> = header.iter().skip(1).map(String::as_str).take(40).collect();
        err(
            file,
            hline,
            1,
            None,
            format!(
                "no column named \"{market}\" for --market (names are case-sensitive); the columns are: {}{}",
                columns.join(", "),
                if header.len() > 41 { ", …" } else { "" }
            ),
        )
    })
}

/// The factor names and their one-based columns: every column after the
/// first but the market's, each named, no name twice.
fn factor_columns(
    file: &str,
    hline: usize,
    header: &[String],
    market_column: Option<usize>,
) -> Result<(Vec<String>, Vec<usize>), CsvError> {
    let mut columns = Vec::new();
    let mut names: Vec<String> = Vec::new();
    for (i, h) in header.iter().enumerate().skip(1) {
        let col = i + 1;
        if Some(col) == market_column {
            continue;
        }
        if h.is_empty() {
            return Err(err(file, hline, col, None, "factor name is empty"));
        }
        if let Some(first) = names.iter().position(|n| n == h) {
            return Err(err(
                file,
                hline,
                col,
                Some(h),
                format!("duplicate factor name (first in column {})", columns[first]),
            ));
        }
        names.push(h.clone());
        columns.push(col);
    }
    if names.is_empty() {
        return Err(err(file, hline, 1, None, "no factor columns besides the market"));
    }
    Ok((names, columns))
}

/// The data rows: labels, factor values row-major, the market.
struct Body {
    labels: Vec<String>,
    values: Vec<f64>,
    market: Option<Vec<f64>>,
}

/// Reads every data row: as many fields as the header, periods strictly
/// increasing, every cell a number or missing, the market never missing.
fn read_body(
    file: &str,
    header: &[String],
    market_column: Option<usize>,
    rows: impl Iterator<Item = (usize, Vec<String>)>,
) -> Result<Body, CsvError> {
    let mut body = Body { labels: Vec::new(), values: Vec::new(), market: market_column.map(|_| Vec::new()) };
    let mut previous: Option<((u32, u32, u32), String)> = None;
    for (lno, rec) in rows {
        if rec.len() != header.len() {
            return Err(err(
                file,
                lno,
                rec.len().min(header.len()) + 1,
                None,
                format!("row has {} fields but the header has {}", rec.len(), header.len()),
            ));
        }
        let label = &rec[0];
        let key = parse_period(label).ok_or_else(|| {
            err(
                file,
                lno,
                1,
                Some(&header[0]),
                format!("period \"{label}\" is not a date of the form YYYY-MM or YYYY-MM-DD"),
            )
        })?;
        if let Some((pk, pl)) = &previous
            && key <= *pk
        {
            return Err(err(
                file,
                lno,
                1,
                Some(&header[0]),
                format!("period \"{label}\" does not come after \"{pl}\" (periods must be strictly increasing)"),
            ));
        }
        previous = Some((key, label.clone()));
        body.labels.push(label.clone());
        for (i, cell) in rec.iter().enumerate().skip(1) {
            let col = i + 1;
            let v =
                parse_cell(cell).map_err(|m| err(file, lno, col, Some(&header[i]), format!("value \"{cell}\" {m}")))?;
            if Some(col) == market_column {
                if v.is_nan() {
                    return Err(err(
                        file,
                        lno,
                        col,
                        Some(&header[i]),
                        "the market return is missing (it may never be)",
                    ));
                }
                if let Some(m) = body.market.as_mut() {
                    m.push(v);
                }
            } else {
                body.values.push(v);
            }
        }
    }
    Ok(body)
}

/// Reads previous weights from CSV with the header `factor,weight`.
///
/// # Errors
/// A [`CsvError`] naming the line and column of the first problem.
pub fn parse_weights(text: &str, file: &str) -> Result<Vec<(String, f64)>, CsvError> {
    let mut rows = records(text, file)?.into_iter();
    let Some((hline, header)) = rows.next() else {
        return Err(err(file, 1, 1, None, "the file is empty; expected the header factor,weight"));
    };
    if header.len() != 2 || !header[0].eq_ignore_ascii_case("factor") || !header[1].eq_ignore_ascii_case("weight") {
        return Err(err(file, hline, 1, None, "expected the header factor,weight"));
    }
    let mut out: Vec<(String, f64)> = Vec::new();
    let mut first_line: std::collections::HashMap<String, usize> = std::collections::HashMap::new();
    for (lno, rec) in rows {
        if rec.len() != 2 {
            return Err(err(
                file,
                lno,
                rec.len().min(2) + 1,
                None,
                format!("row has {} fields, expected 2", rec.len()),
            ));
        }
        let shown = |v: &str| truncate_for_display(v).into_owned();
        if let Some(first) = first_line.insert(rec[0].clone(), lno) {
            return Err(err(
                file,
                lno,
                1,
                Some("factor"),
                format!("factor \"{}\" appears twice (first on line {first})", shown(&rec[0])),
            ));
        }
        let cell = rec[1].as_str();
        let w = match parse_cell(cell) {
            Ok(v) if !v.is_nan() => v,
            Ok(_) if cell.eq_ignore_ascii_case("nan") => {
                return Err(err(file, lno, 2, Some("weight"), "weight is NaN; a previous weight must be a number"));
            }
            Ok(_) => return Err(err(file, lno, 2, Some("weight"), "weight is missing")),
            Err(m) => return Err(err(file, lno, 2, Some("weight"), format!("value \"{}\" {m}", shown(cell)))),
        };
        if w.abs() > MAX_PREVIOUS_WEIGHT {
            return Err(err(
                file,
                lno,
                2,
                Some("weight"),
                format!(
                    "weight {} is outside ±{} (multiples of NAV)",
                    crate::estimator::error::display_number(w),
                    MAX_PREVIOUS_WEIGHT
                ),
            ));
        }
        out.push((rec[0].clone(), w));
    }
    Ok(out)
}

/// Reads a file to text with the path in the error.
///
/// # Errors
/// The I/O error, with the path.
pub fn read_text(path: &Path) -> anyhow::Result<String> {
    use anyhow::Context as _;
    let bytes = std::fs::read(path).with_context(|| format!("cannot read {}", path.display()))?;
    decode_text(bytes, &path.display().to_string()).map_err(anyhow::Error::from)
}

/// The text of a file that must be UTF-8: a UTF-16 file (by its byte-order
/// mark) or an invalid byte is an error naming the line and column.
///
/// # Errors
/// A [`CsvError`] at the first byte that is not UTF-8.
pub fn decode_text(bytes: Vec<u8>, file: &str) -> Result<String, CsvError> {
    if bytes.starts_with(&[0xFF, 0xFE]) || bytes.starts_with(&[0xFE, 0xFF]) {
        return Err(err(
            file,
            1,
            1,
            None,
            "the file is UTF-16 (it starts with a UTF-16 byte-order mark); save it as UTF-8",
        ));
    }
    String::from_utf8(bytes).map_err(|e| {
        let at = e.utf8_error().valid_up_to();
        let before = &e.as_bytes()[..at];
        let line = 1 + before.iter().filter(|&&b| b == b'\n').count();
        let start = before.iter().rposition(|&b| b == b'\n').map_or(0, |p| p + 1);
        let column = 1 + before[start..].iter().filter(|&&b| b == b',').count();
        err(file, line, column, None, format!("byte {at} is not UTF-8; save the file as UTF-8"))
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn reads_a_small_file_with_market_and_missing() {
        let text = "period,MKT,a,\"b, c\"\n2001-01,0.01,0.02,NA\n2001-02,0.00,-0.01,0.03\n";
        let p = parse_returns(text, "t.csv", Some("MKT")).unwrap();
        assert_eq!(p.panel.factor_names, vec!["a", "b, c"]);
        assert_eq!(p.panel.rows, 2);
        assert_eq!(p.panel.market, Some(vec![0.01, 0.0]));
        assert!(p.panel.returns[1].is_nan());
        assert_eq!(p.factor_columns, vec![3, 4]);
    }

    #[test]
    fn weights_file_errors_name_line_and_column_and_stay_short() {
        let e = parse_weights("factor,weight\na,0.1\nb,1e300\n", "w.csv").unwrap_err();
        assert_eq!((e.line, e.column), (3, 2));
        assert!(e.to_string().contains("1e300") && e.to_string().len() < 200, "{e}");
        let e = parse_weights("factor,weight\na,NaN\n", "w.csv").unwrap_err();
        assert!(e.to_string().contains("NaN") && !e.to_string().contains("missing"), "{e}");
        let e = parse_weights("factor,weight\na,\n", "w.csv").unwrap_err();
        assert!(e.to_string().contains("missing"), "{e}");
        let huge = "9".repeat(100_000);
        let e = parse_weights(&format!("factor,weight\na,{huge}x\n"), "w.csv").unwrap_err();
        assert!(e.to_string().len() < 300, "the bad cell is truncated: {} bytes", e.to_string().len());
        let e = parse_weights("factor,weight\na,0.1\nb,0.2\na,0.3\n", "w.csv").unwrap_err();
        assert_eq!(e.line, 4);
        assert!(e.to_string().contains("first on line 2"), "{e}");
        // 20,000 rows parse (linear line counting and a hash set of names).
        let mut big = String::from("factor,weight\n");
        for i in 0..20_000 {
            big.push_str(&format!("f{i},0.0001\n"));
        }
        assert_eq!(parse_weights(&big, "w.csv").unwrap().len(), 20_000);
    }

    #[test]
    fn a_utf16_or_invalid_file_is_named_by_line() {
        let utf16: Vec<u8> =
            [0xFF, 0xFE].into_iter().chain("factor,weight".encode_utf16().flat_map(u16::to_le_bytes)).collect();
        let e = decode_text(utf16, "w.csv").unwrap_err();
        assert!(e.to_string().contains("UTF-16") && e.line == 1, "{e}");
        let e = decode_text(b"factor,weight\na,0.\xff1\n".to_vec(), "w.csv").unwrap_err();
        assert_eq!((e.line, e.column), (2, 2));
    }

    #[test]
    fn errors_name_line_and_column() {
        let e = parse_returns("period,a,b\n2001-01,0.1,x\n", "t.csv", None).unwrap_err();
        assert_eq!((e.line, e.column), (2, 3));
        let e = parse_returns("period,a,b\n2001-01,0.1\n", "t.csv", None).unwrap_err();
        assert_eq!(e.line, 2);
        let e = parse_returns("period,a,b\n2001-02,0.1,0.2\n2001-01,0.1,0.2\n", "t.csv", None).unwrap_err();
        assert_eq!((e.line, e.column), (3, 1));
        let e = parse_returns("period,a,b\n2001-01,inf,0.2\n", "t.csv", None).unwrap_err();
        assert_eq!((e.line, e.column), (2, 2));
        let e = parse_returns("period,a,a\n", "t.csv", None).unwrap_err();
        assert_eq!((e.line, e.column), (1, 3));
        // Blank lines keep their place in the count.
        let e = parse_returns("period,a\n\n2001-01,x\n", "t.csv", None).unwrap_err();
        assert_eq!((e.line, e.column), (3, 2));
        // A quote left open swallows the next line into the field, which is then no number.
        let e = parse_returns("period,a\n2001-01,\"0.1\n2001-02,0.2\n", "t.csv", None).unwrap_err();
        assert_eq!((e.line, e.column), (2, 2));
    }
}
