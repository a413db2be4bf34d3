//! `framewarden export`: one run's frames, objects, alerts or flags as a tidy
//! table (one row per thing, one column per variable, units in the names) in
//! CSV or Parquet, for pandas, R or DuckDB.
//!
//! The database is opened and the run picked by [`store::read_run`], as for
//! `status`. Rows stream from one SQLite statement into the output: CSV record
//! by record, Parquet in row groups of [`ROW_GROUP_ROWS`] rows, so memory stays
//! bounded whatever the run's size. A file named with `-o` is written beside
//! its final name and renamed into place once complete. Every query reads its
//! rows in output order, so SQLite never sorts (a sort would read the whole
//! table before the first row: tested on the query plans).

use std::fmt::Write as _;
use std::fs::File;
use std::io::{BufWriter, Write};
use std::path::{Path, PathBuf};
use std::sync::Arc;

use arrow_array::builder::{Float64Builder, Int64Builder, StringBuilder};
use arrow_array::{ArrayRef, RecordBatch};
use arrow_schema::{DataType, Field, Schema, SchemaRef};
use parquet::arrow::ArrowWriter;
use parquet::basic::Compression;
use parquet::file::properties::WriterProperties;
use rusqlite::types::ValueRef;
use rusqlite::{Connection, Row};

use crate::store::{self, iso_time_sql, StoreError, COUNT_USED_SQL};
use crate::text::shown_path;

/// Rows per Parquet row group, and per batch held in memory before it is
/// written: about 64 k rows × 30 columns × 8 bytes, some 16 MB at most.
pub const ROW_GROUP_ROWS: usize = 65_536;

/// Which table to export (on the command line: `frames`, `objects`,
/// `alerts`, `flags`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum Table {
    /// One row per recorded version of a file (any status).
    Frames,
    /// One row per object, of both results of a recounted frame.
    Objects,
    /// One row per alert episode.
    Alerts,
    /// One row per quality flag of a frame.
    Flags,
}

/// The file format written (on the command line: `csv`, `parquet`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum Format {
    /// Comma-separated values with a header line; an empty field is a missing value.
    Csv,
    /// Apache Parquet, Snappy-compressed, one row group per [`ROW_GROUP_ROWS`] rows.
    Parquet,
}

/// Errors of an export, each naming the file concerned.
#[derive(Debug, thiserror::Error)]
pub enum ExportError {
    /// The database could not be opened or read, or has no such run.
    #[error(transparent)]
    Store(#[from] StoreError),
    /// The database has no run at all.
    #[error("{0} has no run recorded yet: nothing to export")]
    Empty(PathBuf),
    /// Parquet asked for without an output file.
    #[error("Parquet is binary and is not written to the terminal: pass -o FILE")]
    ParquetNeedsFile,
    /// The output could not be written.
    #[error("cannot write {path}: {source}")]
    Write {
        /// The output file, or `standard output`.
        path: String,
        /// The cause.
        source: std::io::Error,
    },
    /// The Parquet writer failed.
    #[error("cannot write {path}: {source}")]
    Parquet {
        /// The output file.
        path: String,
        /// The cause.
        source: parquet::errors::ParquetError,
    },
}

/// What an export wrote.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Exported {
    /// The run exported.
    pub run: i64,
    /// Rows written (header not counted).
    pub rows: u64,
}

/// The type of a column, the same in CSV (as text) and Parquet.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Kind {
    Int,
    Real,
    Text,
}

/// One output column: its name (with its unit) and the SQL that reads it.
struct Column {
    name: &'static str,
    kind: Kind,
    sql: String,
}

fn col(name: &'static str, kind: Kind, sql: impl Into<String>) -> Column {
    Column {
        name,
        kind,
        sql: sql.into(),
    }
}

/// A time column pair: RFC 3339 UTC text and epoch milliseconds.
fn times(columns: &mut Vec<Column>, text: &'static str, ms: &'static str, sql: &str) {
    columns.push(col(text, Kind::Text, iso_time_sql(sql)));
    columns.push(col(ms, Kind::Int, sql));
}

/// The position and time point of frame `f`: `well`, `site`, `time_point` (an
/// integer where the file name's text is all digits), `time_point_text` (as
/// named) and `channel`.
fn position(columns: &mut Vec<Column>) {
    use Kind::{Int, Text};
    columns.push(col("well", Text, "f.well"));
    columns.push(col("site", Text, "f.site"));
    columns.push(col(
        "time_point",
        Int,
        "CASE WHEN f.time_point <> '' AND f.time_point NOT GLOB '*[^0-9]*' \
         AND length(f.time_point) <= 18 THEN CAST(f.time_point AS INTEGER) END",
    ));
    columns.push(col("time_point_text", Text, "f.time_point"));
    columns.push(col("channel", Text, "f.channel"));
}

/// The columns and the `FROM … ORDER BY` of a table; `?1` is the run.
fn layout(table: Table) -> (Vec<Column>, &'static str) {
    use Kind::{Int, Real, Text};
    let run = if table == Table::Alerts {
        "a.run_id"
    } else {
        "f.run_id"
    };
    let mut c = vec![col("run", Int, run)];
    match table {
        Table::Frames => {
            c.push(col("frame_id", Int, "f.id"));
            c.push(col("file", Text, "f.file"));
            c.push(col("version", Int, "f.version"));
            position(&mut c);
            c.extend([
                col("status", Text, "f.status"),
                col("error", Text, "f.error"),
                col("count_used", Int, COUNT_USED_SQL),
                col(
                    "count_source",
                    Text,
                    "CASE WHEN f.object_count IS NOT NULL THEN COALESCE(f.count_source, 'raw') END",
                ),
                col("object_count", Int, "f.object_count"),
                col("recount_object_count", Int, "f.recount_object_count"),
                col("size_filtered", Int, "f.size_filtered"),
                col("method", Text, "f.method"),
                col("threshold", Real, "f.threshold"),
                col("recount_threshold", Real, "f.recount_threshold"),
                col("separability", Real, "f.separability"),
                col("bimodality", Real, "f.bimodality"),
                col("foreground_fraction", Real, "f.foreground_fraction"),
                col("merged_fraction", Real, "f.merged_fraction"),
                col("dim_objects", Int, "f.dim_objects"),
                col("dim_level", Real, "f.dim_level"),
                col("background_level", Real, "f.background_level"),
                col("saturation_fraction", Real, "f.saturation_fraction"),
                col("focus", Real, "f.focus"),
                col("illumination_change", Real, "f.illumination_change"),
                col("width_px", Int, "f.width"),
                col("height_px", Int, "f.height"),
                col("bit_depth", Int, "f.bit_depth"),
                col("pixel_size_um", Real, "f.pixel_size_um"),
                col("pixel_size_source", Text, "f.pixel_size_source"),
                col(
                    "flags",
                    Text,
                    "(SELECT group_concat(flag, ';') FROM \
                     (SELECT flag FROM flags WHERE frame_id = f.id ORDER BY id))",
                ),
            ]);
            times(&mut c, "detected_at", "detected_at_ms", "f.detected_at_ms");
            times(&mut c, "ready_at", "ready_at_ms", "f.ready_at_ms");
            times(&mut c, "analyzed_at", "analyzed_at_ms", "f.analyzed_at_ms");
            c.extend([
                col("latency_ms", Int, "f.latency_ms"),
                col("attempts", Int, "f.attempts"),
                col("interruptions", Int, "f.interruptions"),
            ]);
            (c, "FROM frames f WHERE +f.run_id = ?1 ORDER BY f.id")
        }
        Table::Objects => {
            c.push(col("frame_id", Int, "f.id"));
            c.push(col("file", Text, "f.file"));
            position(&mut c);
            c.extend([
                col("result", Text, "o.result"),
                col("used", Int, "o.result = COALESCE(f.count_source, 'raw')"),
                col("label", Int, "o.label"),
                col("area_px", Int, "o.area_px"),
                col("area_um2", Real, "o.area_um2"),
                col("centroid_x_px", Real, "o.centroid_x"),
                col("centroid_y_px", Real, "o.centroid_y"),
                col("bbox_x_min_px", Int, "o.bbox_x_min"),
                col("bbox_y_min_px", Int, "o.bbox_y_min"),
                col("bbox_x_max_px", Int, "o.bbox_x_max"),
                col("bbox_y_max_px", Int, "o.bbox_y_max"),
                col("mean_intensity", Real, "o.mean_intensity"),
                col("integrated_intensity", Real, "o.integrated_intensity"),
                col("max_intensity", Real, "o.max_intensity"),
                col("perimeter_px", Real, "o.perimeter_px"),
                col("circularity", Real, "o.circularity"),
                col("major_axis_px", Real, "o.major_axis_px"),
                col("minor_axis_px", Real, "o.minor_axis_px"),
                col("eccentricity", Real, "o.eccentricity"),
                col("solidity", Real, "o.solidity"),
                col("channels", Text, "o.channels"),
            ]);
            // Frames outside, in id order, each frame's objects by primary
            // key: rows come out sorted without a sort. (`+` keeps SQLite
            // from the run index, whose order would need a sort of every row
            // before the first one could be written.)
            (
                c,
                "FROM frames f CROSS JOIN objects o ON o.frame_id = f.id WHERE +f.run_id = ?1 \
                 ORDER BY f.id, o.result, o.label",
            )
        }
        Table::Alerts => {
            c.extend([
                col("alert_id", Int, "a.id"),
                col("condition", Text, "a.condition"),
            ]);
            times(&mut c, "opened_at", "opened_at_ms", "a.opened_at_ms");
            times(&mut c, "closed_at", "closed_at_ms", "a.closed_at_ms");
            c.extend([
                col("frame_id", Int, "a.frame_id"),
                col("file", Text, "COALESCE(a.file, f.file)"),
            ]);
            position(&mut c);
            c.extend([
                col("message", Text, "a.message"),
                col("closed_message", Text, "a.closed_message"),
            ]);
            times(
                &mut c,
                "delivered_at",
                "delivered_at_ms",
                "a.delivered_at_ms",
            );
            (
                c,
                "FROM alerts a LEFT JOIN frames f ON f.id = a.frame_id WHERE a.run_id = ?1 ORDER BY a.id",
            )
        }
        Table::Flags => {
            c.extend([
                col("flag_id", Int, "g.id"),
                col("frame_id", Int, "f.id"),
                col("file", Text, "f.file"),
            ]);
            position(&mut c);
            c.extend([
                col("flag", Text, "g.flag"),
                col("value", Real, "g.value"),
                col("limit", Real, "g.limit_value"),
                col("message", Text, "g.message"),
            ]);
            (
                c,
                "FROM flags g JOIN frames f ON f.id = g.frame_id WHERE +f.run_id = ?1 ORDER BY g.id",
            )
        }
    }
}

/// The header of a table, in output order (documentation and tests).
pub fn column_names(table: Table) -> Vec<&'static str> {
    layout(table).0.iter().map(|c| c.name).collect()
}

/// Exports `table` of run `run` (by default the current or last one) of the
/// database `db` as `format`, into `out` (standard output when `None`; Parquet
/// needs a file).
///
/// # Errors
/// [`ExportError`]: the database's errors, an empty database, an output that
/// cannot be written.
pub fn export(
    db: &Path,
    run: Option<i64>,
    analysis: Option<i64>,
    table: Table,
    format: Format,
    out: Option<&Path>,
) -> Result<Exported, ExportError> {
    if format == Format::Parquet && out.is_none() {
        return Err(ExportError::ParquetNeedsFile);
    }
    store::read_run(db, run, analysis, |conn, picked| {
        let run_id = picked
            .ok_or_else(|| ExportError::Empty(db.to_path_buf()))?
            .run_id;
        let rows = match out {
            None => {
                let stdout = std::io::stdout();
                let sink = CsvSink::new(stdout.lock(), &layout(table).0, "standard output");
                stream(conn, db, table, run_id, sink)?
            }
            Some(path) => write_file(path, |file| {
                let shown = shown_path(path);
                match format {
                    Format::Csv => {
                        let sink = CsvSink::new(BufWriter::new(file), &layout(table).0, &shown);
                        stream(conn, db, table, run_id, sink)
                    }
                    Format::Parquet => {
                        let sink = ParquetSink::new(file, &layout(table).0, &shown)?;
                        stream(conn, db, table, run_id, sink)
                    }
                }
            })?,
        };
        Ok(Exported { run: run_id, rows })
    })
}

/// Writes `path` through `write` into `<path>.partial`, renamed to `path`
/// when complete and removed on failure: a reader never sees half a table.
fn write_file(
    path: &Path,
    write: impl FnOnce(File) -> Result<u64, ExportError>,
) -> Result<u64, ExportError> {
    let mut partial = path.as_os_str().to_owned();
    partial.push(".partial");
    let partial = PathBuf::from(partial);
    let io_error = |source| ExportError::Write {
        path: shown_path(path),
        source,
    };
    let file = File::create(&partial).map_err(io_error)?;
    match write(file).and_then(|rows| {
        std::fs::rename(&partial, path)
            .map(|()| rows)
            .map_err(io_error)
    }) {
        Ok(rows) => Ok(rows),
        Err(e) => {
            let _ = std::fs::remove_file(&partial);
            Err(e)
        }
    }
}

/// Where rows go: one call per row, then one to finish.
trait Sink {
    fn row(&mut self, row: &Row<'_>) -> Result<(), RowError>;
    fn finish(self) -> Result<(), ExportError>;
}

/// A row that could not be read (a value of another type than its column's)
/// or written.
enum RowError {
    Sqlite(rusqlite::Error),
    Export(ExportError),
}

impl From<rusqlite::Error> for RowError {
    fn from(e: rusqlite::Error) -> Self {
        RowError::Sqlite(e)
    }
}

impl From<ExportError> for RowError {
    fn from(e: ExportError) -> Self {
        RowError::Export(e)
    }
}

/// CSV through the `csv` crate: a header line, then one record per row;
/// numbers in Rust's shortest form that reads back exactly, a missing value
/// as an empty field.
struct CsvSink<W: Write> {
    out: csv::Writer<W>,
    path: String,
    header: Vec<&'static str>,
    width: usize,
    number: String,
}

impl<W: Write> CsvSink<W> {
    fn new(out: W, columns: &[Column], path: &str) -> Self {
        CsvSink {
            out: csv::Writer::from_writer(out),
            path: path.to_string(),
            header: columns.iter().map(|c| c.name).collect(),
            width: columns.len(),
            number: String::new(),
        }
    }

    fn error(&self, e: impl Into<std::io::Error>) -> ExportError {
        ExportError::Write {
            path: self.path.clone(),
            source: e.into(),
        }
    }
}

impl<W: Write> Sink for CsvSink<W> {
    fn row(&mut self, row: &Row<'_>) -> Result<(), RowError> {
        if !self.header.is_empty() {
            let header = std::mem::take(&mut self.header);
            self.out.write_record(&header).map_err(|e| self.error(e))?;
        }
        for i in 0..self.width {
            let value = row.get_ref(i)?;
            self.number.clear();
            match value {
                ValueRef::Null => {}
                ValueRef::Integer(v) => write!(self.number, "{v}").expect("writing to a String"),
                ValueRef::Real(v) => write!(self.number, "{v}").expect("writing to a String"),
                ValueRef::Text(_) | ValueRef::Blob(_) => {}
            }
            let written = match value {
                ValueRef::Text(t) | ValueRef::Blob(t) => self.out.write_field(t),
                _ => self.out.write_field(&self.number),
            };
            written.map_err(|e| self.error(e))?;
        }
        self.out
            .write_record(None::<&[u8]>)
            .map_err(|e| self.error(e))?;
        Ok(())
    }

    fn finish(mut self) -> Result<(), ExportError> {
        if !self.header.is_empty() {
            let header = std::mem::take(&mut self.header);
            self.out.write_record(&header).map_err(|e| self.error(e))?;
        }
        self.out.flush().map_err(|e| self.error(e))
    }
}

/// One column's values of the batch being filled.
enum Builder {
    Int(Int64Builder),
    Real(Float64Builder),
    Text(StringBuilder),
}

/// Parquet through the Apache `parquet` crate's Arrow writer: each column
/// typed (64-bit integers, doubles, UTF-8 text, all nullable), rows gathered
/// into Arrow arrays of [`ROW_GROUP_ROWS`] and written as one row group each.
struct ParquetSink {
    out: ArrowWriter<File>,
    schema: SchemaRef,
    builders: Vec<Builder>,
    rows: usize,
    path: String,
}

impl ParquetSink {
    fn new(file: File, columns: &[Column], path: &str) -> Result<Self, ExportError> {
        let fields: Vec<Field> = columns
            .iter()
            .map(|c| {
                let t = match c.kind {
                    Kind::Int => DataType::Int64,
                    Kind::Real => DataType::Float64,
                    Kind::Text => DataType::Utf8,
                };
                Field::new(c.name, t, true)
            })
            .collect();
        let schema: SchemaRef = Arc::new(Schema::new(fields));
        let props = WriterProperties::builder()
            .set_compression(Compression::SNAPPY)
            .set_max_row_group_row_count(Some(ROW_GROUP_ROWS))
            .set_created_by(format!("framewarden {}", env!("CARGO_PKG_VERSION")))
            .build();
        let out = ArrowWriter::try_new(file, schema.clone(), Some(props)).map_err(|source| {
            ExportError::Parquet {
                path: path.to_string(),
                source,
            }
        })?;
        let mut sink = ParquetSink {
            out,
            schema,
            builders: Vec::new(),
            rows: 0,
            path: path.to_string(),
        };
        sink.builders = sink.fresh_builders();
        Ok(sink)
    }

    fn fresh_builders(&self) -> Vec<Builder> {
        self.schema
            .fields()
            .iter()
            .map(|f| match f.data_type() {
                DataType::Int64 => Builder::Int(Int64Builder::with_capacity(ROW_GROUP_ROWS)),
                DataType::Float64 => Builder::Real(Float64Builder::with_capacity(ROW_GROUP_ROWS)),
                _ => Builder::Text(StringBuilder::with_capacity(
                    ROW_GROUP_ROWS,
                    ROW_GROUP_ROWS * 16,
                )),
            })
            .collect()
    }

    fn error(&self, source: impl Into<parquet::errors::ParquetError>) -> ExportError {
        ExportError::Parquet {
            path: self.path.clone(),
            source: source.into(),
        }
    }

    /// Writes the rows gathered so far as one row group.
    fn write_batch(&mut self) -> Result<(), ExportError> {
        if self.rows == 0 {
            return Ok(());
        }
        let arrays: Vec<ArrayRef> = self
            .builders
            .iter_mut()
            .map(|b| -> ArrayRef {
                match b {
                    Builder::Int(b) => Arc::new(b.finish()),
                    Builder::Real(b) => Arc::new(b.finish()),
                    Builder::Text(b) => Arc::new(b.finish()),
                }
            })
            .collect();
        let batch = RecordBatch::try_new(self.schema.clone(), arrays).map_err(|e| self.error(e))?;
        self.out.write(&batch).map_err(|e| self.error(e))?;
        self.out.flush().map_err(|e| self.error(e))?;
        self.rows = 0;
        Ok(())
    }
}

impl Sink for ParquetSink {
    fn row(&mut self, row: &Row<'_>) -> Result<(), RowError> {
        for (i, builder) in self.builders.iter_mut().enumerate() {
            match builder {
                Builder::Int(b) => b.append_option(row.get::<_, Option<i64>>(i)?),
                Builder::Real(b) => b.append_option(row.get::<_, Option<f64>>(i)?),
                Builder::Text(b) => match row.get_ref(i)? {
                    ValueRef::Null => b.append_null(),
                    ValueRef::Text(t) | ValueRef::Blob(t) => {
                        b.append_value(String::from_utf8_lossy(t));
                    }
                    ValueRef::Integer(v) => b.append_value(v.to_string()),
                    ValueRef::Real(v) => b.append_value(v.to_string()),
                },
            }
        }
        self.rows += 1;
        if self.rows == ROW_GROUP_ROWS {
            self.write_batch()?;
        }
        Ok(())
    }

    fn finish(mut self) -> Result<(), ExportError> {
        self.write_batch()?;
        let path = self.path.clone();
        self.out
            .close()
            .map(|_| ())
            .map_err(|source| ExportError::Parquet { path, source })
    }
}

/// The table's query; `?1` is the run.
fn select_sql(table: Table) -> String {
    let (columns, from) = layout(table);
    let select: Vec<&str> = columns.iter().map(|c| c.sql.as_str()).collect();
    format!("SELECT {} {from}", select.join(", "))
}

/// Runs the table's query for `run_id` and feeds every row to `sink`.
fn stream(
    conn: &Connection,
    db: &Path,
    table: Table,
    run_id: i64,
    mut sink: impl Sink,
) -> Result<u64, ExportError> {
    let sql = select_sql(table);
    let sqlite = |source| {
        ExportError::Store(StoreError::Sqlite {
            path: db.to_path_buf(),
            source,
        })
    };
    let mut stmt = conn.prepare(&sql).map_err(sqlite)?;
    let mut rows = stmt.query([run_id]).map_err(sqlite)?;
    let mut n = 0u64;
    while let Some(row) = rows.next().map_err(sqlite)? {
        sink.row(row).map_err(|e| match e {
            RowError::Sqlite(source) => sqlite(source),
            RowError::Export(e) => e,
        })?;
        n += 1;
    }
    sink.finish()?;
    Ok(n)
}

#[cfg(test)]
mod tests {
    use super::*;

    const TABLES: [Table; 4] = [Table::Frames, Table::Objects, Table::Alerts, Table::Flags];

    #[test]
    fn every_query_streams_in_output_order_without_a_sort() {
        let dir = tempfile::tempdir().unwrap();
        let conn = store::open_for_writing(&dir.path().join("fw.db")).unwrap();
        for table in TABLES {
            let plan: Vec<String> = conn
                .prepare(&format!("EXPLAIN QUERY PLAN {}", select_sql(table)))
                .unwrap()
                .query_map([1], |r| r.get::<_, String>(3))
                .unwrap()
                .collect::<Result<_, _>>()
                .unwrap();
            assert!(
                !plan.iter().any(|step| step.contains("TEMP B-TREE")),
                "{table:?}: {plan:?}"
            );
        }
    }

    #[test]
    fn column_names_are_unique_and_start_with_the_run() {
        for table in TABLES {
            let names = column_names(table);
            let unique: std::collections::BTreeSet<_> = names.iter().collect();
            assert_eq!(unique.len(), names.len(), "{table:?}");
            assert_eq!(names[0], "run");
        }
    }

    #[test]
    fn tables_and_formats_are_named_as_the_readme_says() {
        use clap::ValueEnum;
        let names = |values: &[Option<clap::builder::PossibleValue>]| -> Vec<String> {
            values
                .iter()
                .map(|v| v.as_ref().unwrap().get_name().to_string())
                .collect()
        };
        let tables: Vec<_> = Table::value_variants()
            .iter()
            .map(Table::to_possible_value)
            .collect();
        assert_eq!(names(&tables), ["frames", "objects", "alerts", "flags"]);
        let formats: Vec<_> = Format::value_variants()
            .iter()
            .map(Format::to_possible_value)
            .collect();
        assert_eq!(names(&formats), ["csv", "parquet"]);
        assert_eq!(Table::from_str("objects", false), Ok(Table::Objects));
    }
}
