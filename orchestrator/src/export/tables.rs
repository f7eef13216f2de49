//! Tidy tables of a workspace for notebooks (`rondo table`): every recorded metric of every
//! attempt (one row per point, iteration, stage, attempt and metric) and each point's final
//! values with their errors (one row per point and metric), as CSV or JSON Lines. The
//! columns are documented in docs/tables.md. Retired points (a revision removed their
//! values) are in the metrics table and, with `--with-retired`, in the finals; both mark
//! them in the column `retired_in`.
//!
//! Rows are written as they are read: the metrics come from the store a page at a time (`--page`)
//! ([`crate::store::reads::tables::metrics_page`]), so a workspace of millions of metrics is
//! never held in memory. Numbers are written in Rust's shortest round-trip form (the text
//! reads back to the same double). Final values are [`crate::query::analysis::final_value`]'s.
//! No SQL here, no engine, no command line.

use std::io::Write;

use anyhow::{Context, Result};
use serde_json::Value;
use sqlx::SqlitePool;

use crate::query::analysis;
use crate::store::reads::{metrics, points, tables};

/// How a table is written.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Format {
    /// Comma-separated values with a header line (RFC 4180 quoting).
    Csv,
    /// One JSON object per line.
    Jsonl,
}

/// Which table.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Table {
    /// Every metric of every attempt.
    Metrics,
    /// Each point's final value of each metric; of retired points too when `with_retired`.
    Finals { with_retired: bool },
}

/// The fixed columns of the metrics table, before the sweep axes.
pub const METRIC_COLUMNS: &[&str] = &[
    "point",
    "iteration",
    "stage",
    "attempt",
    "attempt_id",
    "metric",
    "value",
    "error",
    "attempt_state",
    "iteration_state",
    "started_at",
    "ended_at",
    "retired_in",
];

/// The fixed columns of the final-values table, before the sweep axes.
pub const FINAL_COLUMNS: &[&str] = &[
    "point",
    "point_state",
    "metric",
    "value",
    "error",
    "how",
    "first_iteration",
    "last_iteration",
    "n_iterations",
    "retired_in",
];

/// One cell.
#[derive(Debug, Clone, PartialEq)]
enum Cell {
    Null,
    Int(i64),
    Num(f64),
    Text(String),
    /// A sweep value as recorded (number, text or boolean).
    Json(Value),
}

/// The points' sweep values: the axes (in the order of the first point's values) and, per
/// point, one cell per axis; and the revision that retired each retired point.
struct Sweep {
    columns: Vec<String>,
    values: std::collections::HashMap<String, Vec<Cell>>,
    retired: std::collections::HashMap<String, i64>,
}

impl Sweep {
    /// Read the points; an axis whose name is one of the fixed columns is written as
    /// `sweep:NAME`.
    async fn read(pool: &SqlitePool, fixed: &[&str]) -> Result<Sweep> {
        let mut axes: Vec<String> = Vec::new();
        let mut parsed = Vec::new();
        let mut retired = std::collections::HashMap::new();
        // Every point: the metrics table holds every attempt, retired points' too.
        for (id, json, retired_in) in points::values_with_retired(pool).await? {
            if let Some(n) = retired_in {
                retired.insert(id.clone(), n);
            }
            let v: serde_json::Map<String, Value> = serde_json::from_str(&json)
                .with_context(|| format!("point {id}: its recorded sweep values do not parse"))?;
            for k in v.keys() {
                if !axes.contains(k) {
                    axes.push(k.clone());
                }
            }
            parsed.push((id, v));
        }
        let mut values = std::collections::HashMap::new();
        for (id, v) in parsed {
            let cells = axes
                .iter()
                .map(|a| v.get(a).cloned().map(Cell::Json).unwrap_or(Cell::Null))
                .collect();
            values.insert(id, cells);
        }
        let columns = axes
            .into_iter()
            .map(|a| {
                if fixed.contains(&a.as_str()) {
                    format!("sweep:{a}")
                } else {
                    a
                }
            })
            .collect();
        Ok(Sweep {
            columns,
            values,
            retired,
        })
    }

    /// The `retired_in` cell of a point: the revision that retired it, or empty.
    fn retired_in(&self, point: &str) -> Cell {
        self.retired
            .get(point)
            .map(|n| Cell::Int(*n))
            .unwrap_or(Cell::Null)
    }

    fn of(&self, point: &str) -> Vec<Cell> {
        self.values
            .get(point)
            .cloned()
            .unwrap_or_else(|| vec![Cell::Null; self.columns.len()])
    }
}

/// Writes rows of one table in one format.
struct Writer<'a, W: Write> {
    out: &'a mut W,
    format: Format,
    columns: Vec<String>,
}

impl<W: Write> Writer<'_, W> {
    fn header(&mut self) -> std::io::Result<()> {
        if self.format == Format::Csv {
            let line: Vec<String> = self.columns.iter().map(|c| csv_text(c)).collect();
            writeln!(self.out, "{}", line.join(","))?;
        }
        Ok(())
    }

    fn row(&mut self, cells: &[Cell]) -> std::io::Result<()> {
        match self.format {
            Format::Csv => {
                let line: Vec<String> = cells.iter().map(csv_cell).collect();
                writeln!(self.out, "{}", line.join(","))
            }
            Format::Jsonl => {
                // Keys in column order (a JSON map of serde_json would sort them).
                let mut fields = Vec::with_capacity(cells.len());
                for (c, v) in self.columns.iter().zip(cells) {
                    let key = serde_json::to_string(c).map_err(std::io::Error::other)?;
                    let value =
                        serde_json::to_string(&json_cell(v)).map_err(std::io::Error::other)?;
                    fields.push(format!("{key}:{value}"));
                }
                writeln!(self.out, "{{{}}}", fields.join(","))
            }
        }
    }
}

/// A double in its shortest round-trip text (`0.1`, `1e-300`, `NaN`, `inf`).
pub fn number_text(x: f64) -> String {
    format!("{x:?}")
}

fn csv_text(s: &str) -> String {
    if s.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_string()
    }
}

fn csv_cell(c: &Cell) -> String {
    match c {
        Cell::Null => String::new(),
        Cell::Int(i) => i.to_string(),
        Cell::Num(x) => number_text(*x),
        Cell::Text(s) => csv_text(s),
        Cell::Json(Value::String(s)) => csv_text(s),
        Cell::Json(Value::Number(n)) => match n.as_f64() {
            Some(x) if !(n.is_i64() || n.is_u64()) => number_text(x),
            _ => n.to_string(),
        },
        Cell::Json(Value::Null) => String::new(),
        Cell::Json(v) => csv_text(&v.to_string()),
    }
}

fn json_cell(c: &Cell) -> Value {
    match c {
        Cell::Null => Value::Null,
        Cell::Int(i) => Value::from(*i),
        // serde_json writes doubles in their shortest round-trip form; NaN and ±inf have no
        // JSON number and are written as null.
        Cell::Num(x) => serde_json::Number::from_f64(*x)
            .map(Value::Number)
            .unwrap_or(Value::Null),
        Cell::Text(s) => Value::String(s.clone()),
        Cell::Json(v) => v.clone(),
    }
}

fn opt_num(x: Option<f64>) -> Cell {
    x.map(Cell::Num).unwrap_or(Cell::Null)
}

fn opt_text(s: Option<&str>) -> Cell {
    s.map(|s| Cell::Text(s.to_string())).unwrap_or(Cell::Null)
}

/// Write `table` of the workspace behind `pool` to `out`; returns the number of rows.
/// The metrics are read `page` at a time.
pub async fn write<W: Write>(
    pool: &SqlitePool,
    table: Table,
    format: Format,
    page: u32,
    out: &mut W,
) -> Result<u64> {
    match table {
        Table::Metrics => write_metrics(pool, format, page.max(1), out).await,
        Table::Finals { with_retired } => write_finals(pool, format, with_retired, out).await,
    }
}

/// Every metric of every attempt, page by page.
async fn write_metrics<W: Write>(
    pool: &SqlitePool,
    format: Format,
    page_size: u32,
    out: &mut W,
) -> Result<u64> {
    let sweep = Sweep::read(pool, METRIC_COLUMNS).await?;
    let mut columns: Vec<String> = METRIC_COLUMNS.iter().map(|c| c.to_string()).collect();
    columns.extend(sweep.columns.iter().cloned());
    let mut w = Writer {
        out,
        format,
        columns,
    };
    w.header()?;
    let mut n = 0u64;
    let mut cursor: Option<tables::MetricCursor> = None;
    loop {
        let page = tables::metrics_page(pool, cursor.as_ref(), page_size).await?;
        let Some(last) = page.last() else { break };
        cursor = Some((last.attempt_id, last.name.clone()));
        for r in &page {
            let mut cells = vec![
                Cell::Text(r.point.clone()),
                Cell::Int(r.iteration),
                Cell::Text(r.stage.clone()),
                Cell::Int(r.attempt),
                Cell::Int(r.attempt_id),
                Cell::Text(r.name.clone()),
                Cell::Num(r.value),
                opt_num(r.error),
                Cell::Text(r.attempt_state.as_str().to_string()),
                opt_text(r.iteration_state.map(|s| s.as_str())),
                opt_text(r.started_at.as_deref()),
                opt_text(r.ended_at.as_deref()),
                sweep.retired_in(&r.point),
            ];
            cells.extend(sweep.of(&r.point));
            w.row(&cells)?;
            n += 1;
        }
        if page.len() < page_size as usize {
            break;
        }
    }
    w.out.flush()?;
    Ok(n)
}

/// Each point's final value of every metric recorded at its last good iteration (retired
/// points only `with_retired`).
async fn write_finals<W: Write>(
    pool: &SqlitePool,
    format: Format,
    with_retired: bool,
    out: &mut W,
) -> Result<u64> {
    let sweep = Sweep::read(pool, FINAL_COLUMNS).await?;
    let mut columns: Vec<String> = FINAL_COLUMNS.iter().map(|c| c.to_string()).collect();
    columns.extend(sweep.columns.iter().cloned());
    let mut w = Writer {
        out,
        format,
        columns,
    };
    w.header()?;
    let mut n = 0u64;
    for p in points::all_of(pool, with_retired).await? {
        let Some(last) = points::last_good_iteration(pool, &p.id).await? else {
            continue;
        };
        for name in metrics::names_at(pool, &p.id, last).await? {
            let Some(f) = analysis::final_value(pool, &p.id, &name).await? else {
                continue;
            };
            let mut cells = vec![
                Cell::Text(p.id.clone()),
                Cell::Text(p.state.as_str().to_string()),
                Cell::Text(name),
                Cell::Num(f.value),
                opt_num(f.error),
                Cell::Text(f.how.to_string()),
                f.iterations
                    .first()
                    .map(|i| Cell::Int(i64::from(*i)))
                    .unwrap_or(Cell::Null),
                f.iterations
                    .last()
                    .map(|i| Cell::Int(i64::from(*i)))
                    .unwrap_or(Cell::Null),
                Cell::Int(f.iterations.len() as i64),
                sweep.retired_in(&p.id),
            ];
            cells.extend(sweep.of(&p.id));
            w.row(&cells)?;
            n += 1;
        }
    }
    w.out.flush()?;
    Ok(n)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numbers_read_back_to_the_same_double() {
        for x in [
            0.1,
            1.0 / 3.0,
            -11.959089291369073,
            1e-300,
            6.02214076e23,
            0.0,
        ] {
            let t = number_text(x);
            assert_eq!(t.parse::<f64>().map(f64::to_bits), Ok(x.to_bits()), "{t}");
        }
    }

    #[test]
    fn csv_quotes_only_what_needs_it() {
        assert_eq!(csv_text("p001"), "p001");
        assert_eq!(csv_text("a,b"), "\"a,b\"");
        assert_eq!(csv_text("say \"x\""), "\"say \"\"x\"\"\"");
        assert_eq!(csv_cell(&Cell::Json(serde_json::json!(27))), "27");
        assert_eq!(csv_cell(&Cell::Json(serde_json::json!(27.5))), "27.5");
        assert_eq!(csv_cell(&Cell::Null), "");
    }
}
