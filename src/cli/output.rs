//! The one output layer: every command's rows become a table, CSV or JSON
//! here and nowhere else. A command builds rows; a row says its CSV header
//! and its table cells; serde gives its JSON and its CSV record.
//!
//! Lists print as one JSON array; streams (`alerts watch`) as JSON Lines.
//! CSV is quoted by the `csv` crate; an unset value is an empty field.

use serde::Serialize;
use std::io::Write;

#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub(crate) enum Format {
    Table,
    Csv,
    Json,
}

/// For commands whose rows do not fit CSV's one flat line (prose state).
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub(crate) enum TableOrJson {
    Table,
    Json,
}

impl From<TableOrJson> for Format {
    fn from(f: TableOrJson) -> Format {
        match f {
            TableOrJson::Table => Format::Table,
            TableOrJson::Json => Format::Json,
        }
    }
}

/// One table column: heading and width; numbers align right.
#[derive(Clone, Copy)]
pub(crate) struct Col {
    pub heading: &'static str,
    pub width: usize,
    pub right: bool,
}

impl Col {
    pub(crate) const fn left(heading: &'static str, width: usize) -> Col {
        Col {
            heading,
            width,
            right: false,
        }
    }
    pub(crate) const fn right(heading: &'static str, width: usize) -> Col {
        Col {
            heading,
            width,
            right: true,
        }
    }
}

/// A row any format can render.
pub(crate) trait Row: Serialize {
    /// CSV column names, in the order the row serializes its fields
    /// (nested structs flatten in field order). Columns are only ever
    /// added at the end: scripts index them.
    const CSV_HEADER: &'static [&'static str];
    /// Table columns; empty means the table form is prose, one line per cell.
    const TABLE: &'static [Col];
    /// The row for people: one cell per table column (or prose lines).
    fn table_cells(&self) -> Vec<String>;
}

/// `a` then `b`, at compile time: a row that embeds another (a watched
/// event around its alert) names its own columns first and then the
/// embedded row's, without spelling them twice. `N` must be `A + B`, and
/// `b` not empty.
pub(crate) const fn concat<T: Copy, const A: usize, const B: usize, const N: usize>(
    a: [T; A],
    b: [T; B],
) -> [T; N] {
    assert!(A + B == N, "length is the sum of its parts");
    let mut out = [b[0]; N];
    let mut i = 0;
    while i < A {
        out[i] = a[i];
        i += 1;
    }
    while i < N {
        out[i] = b[i - A];
        i += 1;
    }
    out
}

/// Prints one report (not a list) as one JSON object.
pub(crate) fn print_one<T: Serialize>(value: &T) -> anyhow::Result<()> {
    let stdout = std::io::stdout();
    let mut out = stdout.lock();
    serde_json::to_writer(&mut out, value).map_err(from_json)?;
    writeln!(out)?;
    Ok(())
}

/// Prints rows as a whole list: a JSON array, CSV with its header, or a
/// table with its heading line.
pub(crate) fn print_all<R: Row>(rows: &[R], format: Format) -> anyhow::Result<()> {
    let stdout = std::io::stdout();
    let mut out = stdout.lock();
    match format {
        Format::Json => {
            serde_json::to_writer(&mut out, rows).map_err(from_json)?;
            writeln!(out)?;
        }
        Format::Csv => {
            let mut w = csv_writer(&mut out);
            w.write_record(R::CSV_HEADER).map_err(from_csv)?;
            for r in rows {
                w.serialize(r).map_err(from_csv)?;
            }
            w.flush()?;
        }
        Format::Table => {
            if !R::TABLE.is_empty() {
                writeln!(out, "{}", heading_line(R::TABLE))?;
            }
            for r in rows {
                write_table_row(&mut out, r)?;
            }
        }
    }
    Ok(())
}

/// Prints rows one at a time as they come (JSON Lines for JSON); the
/// header or heading goes before the first.
pub(crate) struct RowStream {
    format: Format,
    started: bool,
}

impl RowStream {
    pub(crate) fn new(format: Format) -> RowStream {
        RowStream {
            format,
            started: false,
        }
    }

    pub(crate) fn row<R: Row>(&mut self, row: &R) -> anyhow::Result<()> {
        let stdout = std::io::stdout();
        let mut out = stdout.lock();
        let first = !std::mem::replace(&mut self.started, true);
        match self.format {
            Format::Json => {
                serde_json::to_writer(&mut out, row).map_err(from_json)?;
                writeln!(out)?;
            }
            Format::Csv => {
                let mut w = csv_writer(&mut out);
                if first {
                    w.write_record(R::CSV_HEADER).map_err(from_csv)?;
                }
                w.serialize(row).map_err(from_csv)?;
                w.flush()?;
            }
            Format::Table => {
                if first && !R::TABLE.is_empty() {
                    writeln!(out, "{}", heading_line(R::TABLE))?;
                }
                write_table_row(&mut out, row)?;
            }
        }
        out.flush()?;
        Ok(())
    }
}

/// Output errors with the I/O error itself kept, so the binary can tell a
/// reader that went away (broken pipe) from a real failure.
fn from_csv(e: csv::Error) -> anyhow::Error {
    match e.into_kind() {
        csv::ErrorKind::Io(io) => io.into(),
        other => anyhow::anyhow!("csv: {other:?}"),
    }
}

fn from_json(e: serde_json::Error) -> anyhow::Error {
    match e.io_error_kind() {
        Some(kind) => std::io::Error::from(kind).into(),
        None => e.into(),
    }
}

fn csv_writer<W: Write>(out: W) -> csv::Writer<W> {
    csv::WriterBuilder::new()
        .has_headers(false)
        .from_writer(out)
}

fn heading_line(cols: &[Col]) -> String {
    let cells: Vec<String> = cols.iter().map(|c| c.heading.to_string()).collect();
    aligned(cols, &cells)
}

fn write_table_row<R: Row>(out: &mut impl Write, row: &R) -> std::io::Result<()> {
    let cells = row.table_cells();
    if R::TABLE.is_empty() {
        for line in cells {
            writeln!(out, "{line}")?;
        }
        return Ok(());
    }
    writeln!(out, "{}", aligned(R::TABLE, &cells))
}

fn aligned(cols: &[Col], cells: &[String]) -> String {
    let mut line = String::new();
    for (i, (col, cell)) in cols.iter().zip(cells).enumerate() {
        if i > 0 {
            line.push(' ');
        }
        let pad = col.width.saturating_sub(cell.chars().count());
        let last = i + 1 == cols.len();
        if col.right {
            line.extend(std::iter::repeat_n(' ', pad));
            line.push_str(cell);
        } else {
            line.push_str(cell);
            if !last {
                line.extend(std::iter::repeat_n(' ', pad));
            }
        }
    }
    line
}

/// `-` for an unset value in a table; `digits` after the point.
pub(crate) fn fixed(v: Option<f64>, digits: usize) -> String {
    v.map(|x| format!("{x:.digits$}"))
        .unwrap_or_else(|| "-".into())
}

/// A fraction as a percentage for tables.
pub(crate) fn percent(v: Option<f64>, digits: usize) -> String {
    fixed(v.map(|x| x * 100.0), digits)
}

/// The header the csv crate derives from a flat row's field names, to
/// hold a row's `CSV_HEADER` to its fields in tests.
#[cfg(test)]
pub(crate) fn derived_csv_header<R: Row>(row: &R) -> Vec<String> {
    let mut w = csv::WriterBuilder::new()
        .has_headers(true)
        .from_writer(Vec::new());
    w.serialize(row).unwrap();
    let text = String::from_utf8(w.into_inner().unwrap()).unwrap();
    let header = text.lines().next().unwrap_or_default();
    header.split(',').map(str::to_string).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[derive(Serialize)]
    struct Probe {
        name: String,
        volts_v: Option<f64>,
    }

    impl Row for Probe {
        const CSV_HEADER: &'static [&'static str] = &["name", "volts_v"];
        const TABLE: &'static [Col] = &[Col::left("name", 6), Col::right("V", 6)];
        fn table_cells(&self) -> Vec<String> {
            vec![self.name.clone(), fixed(self.volts_v, 2)]
        }
    }

    #[test]
    fn csv_quotes_what_needs_it_and_leaves_unset_empty() {
        let mut buf = Vec::new();
        {
            let mut w = csv_writer(&mut buf);
            w.write_record(Probe::CSV_HEADER).unwrap();
            let rows = [
                Probe {
                    name: "a, \"b\"".into(),
                    volts_v: Some(1.25),
                },
                Probe {
                    name: "c".into(),
                    volts_v: None,
                },
            ];
            for r in &rows {
                w.serialize(r).unwrap();
            }
        }
        assert_eq!(
            String::from_utf8(buf).unwrap(),
            "name,volts_v\n\"a, \"\"b\"\"\",1.25\nc,\n"
        );
    }

    #[test]
    fn tables_align_numbers_right_and_text_left() {
        let p = Probe {
            name: "ab".into(),
            volts_v: Some(1.0),
        };
        assert_eq!(heading_line(Probe::TABLE), "name        V");
        assert_eq!(aligned(Probe::TABLE, &p.table_cells()), "ab       1.00");
    }
}
