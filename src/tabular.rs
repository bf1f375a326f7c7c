//! Tables in Arrow form: Parquet files and data frames in, output tables out.
//!
//! In: Arrow record batches (from a Parquet file, or from Python through the Arrow C data
//! interface). Out: the same [`Table`] a CSV file gives, so every later stage sees one kind of
//! input and the answers do not depend on where the data came from. Each value becomes the text
//! a CSV file would hold: text trimmed, integers and decimals in plain digits, floats in their
//! shortest form (1.0 as `1`), dates as `YYYY-MM-DD`, timestamps at midnight as their date;
//! nulls (and NaN) are missing values. The other way, [`csv_to_batch`] turns an output CSV into
//! a typed record batch (its numeric columns as floats), which [`parquet_bytes`] writes.

use crate::error::{Error, Result};
use crate::io::{ReadSpec, ScoredPairs, Table, MAX_CELL_BYTES};
use crate::texts::Texts;
use arrow_array::cast::AsArray;
use arrow_array::types::*;
use arrow_array::{Array, ArrayRef, Float64Array, RecordBatch, StringArray};
use arrow_schema::{DataType, Field, Schema, SchemaRef, TimeUnit};
use std::path::Path;
use std::sync::Arc;

/// The first bytes (and last) of every Parquet file.
const PARQUET_MAGIC: &[u8] = b"PAR1";

/// True when a table is to be read as Parquet: its name ends in `.parquet` or `.pq`, or its
/// bytes start with the Parquet signature.
pub fn is_parquet(path: &Path, bytes: &[u8]) -> bool {
    let ext = path
        .extension()
        .and_then(|e| e.to_str())
        .map(str::to_ascii_lowercase);
    matches!(ext.as_deref(), Some("parquet" | "pq")) || bytes.starts_with(PARQUET_MAGIC)
}

/// Reads the needed columns of a Parquet file's bytes into a [`Table`]. A file that is not
/// Parquet, or is truncated or damaged, is one error naming the file.
pub fn read_parquet(bytes: Vec<u8>, label: &Path, spec: &ReadSpec) -> Result<Table> {
    let sha256 = crate::io::sha256_hex(&bytes);
    let size = bytes.len() as u64;
    let (header, projected, batches) = parquet_batches(bytes, label, |header| {
        Ok(wanted_columns(header, spec)?
            .into_iter()
            .map(|(_, i)| i)
            .collect())
    })?;
    let mut table = table_from_batches(&projected, &batches, label, spec)?;
    table.header = header;
    table.sha256 = sha256;
    table.bytes = size;
    Ok(table)
}

/// Reads scored pairs (`left_id`, `right_id`, `weight`; other columns ignored) from a Parquet
/// file's bytes; see [`scored_pairs_from_batches`].
pub fn read_scored_pairs_parquet(bytes: Vec<u8>, label: &Path) -> Result<ScoredPairs> {
    let (_, projected, batches) = parquet_batches(bytes, label, |header| {
        PAIR_COLUMNS
            .iter()
            .map(|c| pair_column(header, c))
            .collect()
    })?;
    scored_pairs_from_batches(&projected, &batches, label)
}

/// The columns of a table of scored pairs.
const PAIR_COLUMNS: [&str; 3] = ["left_id", "right_id", "weight"];

fn pair_column(header: &[String], want: &str) -> Result<usize> {
    header.iter().position(|n| n == want).ok_or_else(|| {
        Error::input(format!(
            "column `{want}` not found (columns: {}); the table must name left_id, right_id and weight",
            header.join(", ")
        ))
    })
}

/// Scored pairs from record batches with columns `left_id`, `right_id` (any types read as
/// text) and `weight` (numbers, or text holding numbers); checked as the CSV reader checks
/// them, with errors naming the 1-based row.
pub fn scored_pairs_from_batches(
    schema: &SchemaRef,
    batches: &[RecordBatch],
    label: &Path,
) -> Result<ScoredPairs> {
    let at = |e: Error| e.with_file(label);
    let header = names_of(schema);
    let mut cols: Vec<Vec<String>> = Vec::with_capacity(3);
    for name in PAIR_COLUMNS {
        let i = pair_column(&header, name).map_err(at)?;
        let mut col = Vec::new();
        for b in batches {
            let offset = col.len();
            texts_into(b.column(i).as_ref(), &mut col)
                .map_err(|(r, e)| at(e.with_row((offset + r + 1) as u64).with_column(name)))?;
        }
        cols.push(col);
    }
    let mut pairs = crate::io::PairsBuilder::new("row");
    for (r, ((l, rt), w)) in cols[0].iter().zip(&cols[1]).zip(&cols[2]).enumerate() {
        pairs.push(l, rt, w, r as u64 + 1).map_err(at)?;
    }
    pairs.finish().map_err(at)
}

/// The columns `pick` chooses from a Parquet file's header (trimmed names), read whole: the
/// header, the schema of the chosen columns and their batches. A file that is not Parquet,
/// or is truncated or damaged, is one error naming the file.
fn parquet_batches(
    bytes: Vec<u8>,
    label: &Path,
    pick: impl FnOnce(&[String]) -> Result<Vec<usize>>,
) -> Result<(Vec<String>, SchemaRef, Vec<RecordBatch>)> {
    use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
    use parquet::arrow::ProjectionMask;
    let at = |e: Error| e.with_file(label);
    if !bytes.starts_with(PARQUET_MAGIC) {
        return Err(at(Error::input(
            "not a Parquet file (it does not start with the Parquet signature `PAR1`); give a Parquet file, or name a CSV file without the .parquet ending",
        )));
    }
    let damaged = |e: parquet::errors::ParquetError| {
        at(Error::input(format!(
            "not a readable Parquet file (truncated or damaged?): {e}"
        )))
    };
    let builder =
        ParquetRecordBatchReaderBuilder::try_new(bytes::Bytes::from(bytes)).map_err(damaged)?;
    let schema = builder.schema().clone();
    let header = names_of(&schema);
    let roots = pick(&header).map_err(at)?;
    let mask = ProjectionMask::roots(builder.parquet_schema(), roots.iter().copied());
    let reader = builder
        .with_projection(mask)
        .with_batch_size(65_536)
        .build()
        .map_err(damaged)?;
    let batches = reader
        .collect::<std::result::Result<Vec<_>, _>>()
        .map_err(|e| {
            at(Error::input(format!(
                "not a readable Parquet file (truncated or damaged?): {e}"
            )))
        })?;
    let projected = match batches.first() {
        Some(b) => b.schema(),
        None => Arc::new(
            schema
                .project(&sorted(&roots))
                .map_err(|e| at(Error::input(format!("cannot read the Parquet schema: {e}"))))?,
        ),
    };
    Ok((header, projected, batches))
}

fn sorted(v: &[usize]) -> Vec<usize> {
    let mut v = v.to_vec();
    v.sort_unstable();
    v.dedup();
    v
}

/// The trimmed column names of a schema.
fn names_of(schema: &Schema) -> Vec<String> {
    schema
        .fields()
        .iter()
        .map(|f| f.name().trim().to_string())
        .collect()
}

/// The needed columns, the id first (see [`crate::io::needed_columns`]).
fn wanted_columns(header: &[String], spec: &ReadSpec) -> Result<Vec<(String, usize)>> {
    let (id_at, rest) = crate::io::needed_columns(header, spec)?;
    Ok(std::iter::once((spec.id.clone(), id_at))
        .chain(rest)
        .collect())
}

/// A [`Table`] from record batches sharing `schema`: the id column and the needed columns
/// of `spec` as text (see the module's notes), checked as a CSV table is (non-empty, unique
/// ids; at least one record). Errors name the 1-based row. The hash is of the needed values
/// (names and cells, length-prefixed), so equal frames hash equally.
pub fn table_from_batches(
    schema: &SchemaRef,
    batches: &[RecordBatch],
    label: &Path,
    spec: &ReadSpec,
) -> Result<Table> {
    use sha2::{Digest, Sha256};
    let at = |e: Error| e.with_file(label);
    let header = names_of(schema);
    let wanted = wanted_columns(&header, spec).map_err(at)?;
    let rows: usize = batches.iter().map(RecordBatch::num_rows).sum();
    let mut values: Vec<Texts> = Vec::with_capacity(wanted.len());
    for (name, i) in &wanted {
        let mut col = Vec::with_capacity(rows);
        for b in batches {
            let offset = col.len();
            let array = b.column(*i);
            texts_into(array.as_ref(), &mut col).map_err(|(r, e)| {
                at(e.with_row((offset + r + 1) as u64)
                    .with_column(name.as_str()))
            })?;
        }
        values.push(col.iter().collect());
    }
    let ids = values.remove(0);
    if ids.is_empty() {
        return Err(at(Error::input("the table has no records")));
    }
    let lines: Vec<u64> = (1..=ids.len() as u64).collect();
    if let Some((r, msg)) = crate::io::id_problem(&ids, &lines, "row") {
        return Err(at(Error::input(msg)
            .with_row(lines[r])
            .with_column(&spec.id)));
    }
    let mut hash = Sha256::new();
    let mut bytes = 0u64;
    for (k, (name, _)) in wanted.iter().enumerate() {
        let col = if k == 0 { &ids } else { &values[k - 1] };
        hash.update((name.len() as u64).to_le_bytes());
        hash.update(name.as_bytes());
        for v in col.iter() {
            hash.update((v.len() as u64).to_le_bytes());
            hash.update(v.as_bytes());
            bytes += v.len() as u64 + 1;
        }
    }
    let sha256 = hash.finalize().iter().map(|b| format!("{b:02x}")).collect();
    let columns = wanted
        .into_iter()
        .skip(1)
        .map(|(n, _)| n)
        .zip(values)
        .collect();
    Ok(Table {
        path: label.to_path_buf(),
        ids,
        columns,
        header,
        lines,
        bytes,
        sha256,
        place: "row",
    })
}

/// A failure at a 0-based row of one array.
type CellError = (usize, Error);

/// Appends every value of `array` as text ("" for null) to `out`.
fn texts_into(array: &dyn Array, out: &mut Vec<String>) -> std::result::Result<(), CellError> {
    let n = array.len();
    let start = out.len();
    macro_rules! each {
        ($arr:expr, $fmt:expr) => {{
            let a = $arr;
            for r in 0..n {
                out.push(if a.is_null(r) {
                    String::new()
                } else {
                    $fmt(a.value(r))
                });
            }
        }};
    }
    match array.data_type() {
        DataType::Null => out.extend(std::iter::repeat_n(String::new(), n)),
        DataType::Utf8 => each!(array.as_string::<i32>(), |v: &str| v.trim().to_string()),
        DataType::LargeUtf8 => each!(array.as_string::<i64>(), |v: &str| v.trim().to_string()),
        DataType::Utf8View => each!(array.as_string_view(), |v: &str| v.trim().to_string()),
        DataType::Binary => each!(array.as_binary::<i32>(), |v: &[u8]| bytes_text(v)),
        DataType::LargeBinary => each!(array.as_binary::<i64>(), |v: &[u8]| bytes_text(v)),
        DataType::BinaryView => each!(array.as_binary_view(), |v: &[u8]| bytes_text(v)),
        DataType::Boolean => each!(array.as_boolean(), |v: bool| v.to_string()),
        DataType::Int8 => each!(array.as_primitive::<Int8Type>(), |v: i8| v.to_string()),
        DataType::Int16 => each!(array.as_primitive::<Int16Type>(), |v: i16| v.to_string()),
        DataType::Int32 => each!(array.as_primitive::<Int32Type>(), |v: i32| v.to_string()),
        DataType::Int64 => each!(array.as_primitive::<Int64Type>(), |v: i64| v.to_string()),
        DataType::UInt8 => each!(array.as_primitive::<UInt8Type>(), |v: u8| v.to_string()),
        DataType::UInt16 => each!(array.as_primitive::<UInt16Type>(), |v: u16| v.to_string()),
        DataType::UInt32 => each!(array.as_primitive::<UInt32Type>(), |v: u32| v.to_string()),
        DataType::UInt64 => each!(array.as_primitive::<UInt64Type>(), |v: u64| v.to_string()),
        DataType::Float32 => each!(array.as_primitive::<Float32Type>(), |v: f32| {
            if v.is_finite() {
                v.to_string()
            } else {
                float_text(f64::from(v))
            }
        }),
        DataType::Float64 => each!(array.as_primitive::<Float64Type>(), float_text),
        DataType::Decimal128(_, s) => {
            let s = *s;
            each!(array.as_primitive::<Decimal128Type>(), |v: i128| {
                decimal_text(v, s)
            })
        }
        DataType::Decimal64(_, s) => {
            let s = *s;
            each!(array.as_primitive::<Decimal64Type>(), |v: i64| {
                decimal_text(i128::from(v), s)
            })
        }
        DataType::Decimal32(_, s) => {
            let s = *s;
            each!(array.as_primitive::<Decimal32Type>(), |v: i32| {
                decimal_text(i128::from(v), s)
            })
        }
        DataType::Date32 => each!(array.as_primitive::<Date32Type>(), |v: i32| {
            date_text(i64::from(v))
        }),
        DataType::Date64 => each!(array.as_primitive::<Date64Type>(), |v: i64| {
            date_text(v.div_euclid(86_400_000))
        }),
        DataType::Timestamp(unit, _) => {
            let per_second: i64 = match unit {
                TimeUnit::Second => 1,
                TimeUnit::Millisecond => 1_000,
                TimeUnit::Microsecond => 1_000_000,
                TimeUnit::Nanosecond => 1_000_000_000,
            };
            let values = timestamp_values(array);
            for (r, v) in values.into_iter().enumerate() {
                out.push(match v {
                    Some(v) if array.is_valid(r) => timestamp_text(v, per_second),
                    _ => String::new(),
                });
            }
        }
        DataType::Dictionary(_, _) => {
            let dict = array.as_any_dictionary();
            let mut words = Vec::with_capacity(dict.values().len());
            texts_into(dict.values().as_ref(), &mut words)?;
            let keys = dict.normalized_keys();
            for (r, k) in keys.into_iter().enumerate() {
                out.push(if array.is_null(r) {
                    String::new()
                } else {
                    words.get(k).cloned().unwrap_or_default()
                });
            }
        }
        other => {
            return Err((
                0,
                Error::input(format!(
                    "holds values of type {other}, which are not read; give text, numbers or dates"
                )),
            ))
        }
    }
    // Nothing is exempt from the limits a CSV cell has.
    for (r, v) in out[start..].iter().enumerate() {
        if v.len() > MAX_CELL_BYTES {
            return Err((
                r,
                Error::input(format!(
                    "value is {} bytes long, over the limit of {MAX_CELL_BYTES}",
                    v.len()
                )),
            ));
        }
        if v.contains('\0') {
            return Err((
                r,
                Error::input("value holds a NUL byte (0x00), which text never does"),
            ));
        }
        if v == BAD_UTF8 {
            return Err((r, Error::input("bytes are not valid UTF-8 text")));
        }
    }
    Ok(())
}

/// Stands for a binary value that is not UTF-8 until the checks turn it into an error.
const BAD_UTF8: &str = "\u{0}\u{0}not utf-8";

fn bytes_text(v: &[u8]) -> String {
    match std::str::from_utf8(v) {
        Ok(s) => s.trim().to_string(),
        Err(_) => BAD_UTF8.to_string(),
    }
}

/// The i64 values of a timestamp array of any unit (`None` for nulls).
fn timestamp_values(array: &dyn Array) -> Vec<Option<i64>> {
    macro_rules! vals {
        ($t:ty) => {
            array.as_primitive::<$t>().iter().collect()
        };
    }
    match array.data_type() {
        DataType::Timestamp(TimeUnit::Second, _) => vals!(TimestampSecondType),
        DataType::Timestamp(TimeUnit::Millisecond, _) => vals!(TimestampMillisecondType),
        DataType::Timestamp(TimeUnit::Microsecond, _) => vals!(TimestampMicrosecondType),
        _ => vals!(TimestampNanosecondType),
    }
}

/// A float as CSV text: the shortest form that reads back the same (1.0 as `1`); NaN is
/// missing, infinities are written out (and later found not to be numbers).
fn float_text(v: f64) -> String {
    if v.is_nan() {
        String::new()
    } else {
        v.to_string()
    }
}

/// A decimal's digits with `scale` places after the point.
fn decimal_text(v: i128, scale: i8) -> String {
    if scale <= 0 {
        let mut s = v.to_string();
        if v != 0 {
            s.extend(std::iter::repeat_n('0', (-scale) as usize));
        }
        return s;
    }
    let digits = v.unsigned_abs().to_string();
    let scale = scale as usize;
    let padded = format!("{digits:0>width$}", width = scale + 1);
    let (int, frac) = padded.split_at(padded.len() - scale);
    let sign = if v < 0 { "-" } else { "" };
    format!("{sign}{int}.{frac}")
}

/// Days since 1970-01-01 as `YYYY-MM-DD` (proleptic Gregorian; H. Hinnant's civil-from-days
/// algorithm, common practice).
fn date_text(days: i64) -> String {
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z.rem_euclid(146_097);
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = doy - (153 * mp + 2) / 5 + 1;
    let m = if mp < 10 { mp + 3 } else { mp - 9 };
    let y = yoe + era * 400 + i64::from(m <= 2);
    format!("{y:04}-{m:02}-{d:02}")
}

/// A timestamp as its date when it falls at midnight (how birth dates usually arrive from a
/// data frame), else as `YYYY-MM-DD HH:MM:SS` (which a date field does not read).
fn timestamp_text(v: i64, per_second: i64) -> String {
    let secs = v.div_euclid(per_second);
    let sub = v.rem_euclid(per_second);
    let day = secs.div_euclid(86_400);
    let tod = secs.rem_euclid(86_400);
    let date = date_text(day);
    if tod == 0 && sub == 0 {
        return date;
    }
    let (h, m, s) = (tod / 3600, tod / 60 % 60, tod % 60);
    if sub == 0 {
        format!("{date} {h:02}:{m:02}:{s:02}")
    } else {
        let width = per_second.ilog10() as usize;
        format!("{date} {h:02}:{m:02}:{s:02}.{sub:0width$}")
    }
}

/// An output CSV (header and rows, as the tool writes them) as one record batch: the columns
/// in `numeric` as 64-bit floats, the others as text; empty cells are nulls.
pub fn csv_to_batch(csv_bytes: &[u8], numeric: &[&str]) -> Result<RecordBatch> {
    let mut rdr = csv::ReaderBuilder::new()
        .has_headers(true)
        .from_reader(csv_bytes);
    let bad = |e: csv::Error| Error::output(format!("cannot convert an output table: {e}"));
    let header: Vec<String> = rdr
        .headers()
        .map_err(bad)?
        .iter()
        .map(str::to_string)
        .collect();
    let mut cells: Vec<Vec<String>> = vec![Vec::new(); header.len()];
    for rec in rdr.records() {
        let rec = rec.map_err(bad)?;
        for (col, v) in cells.iter_mut().zip(rec.iter()) {
            col.push(v.to_string());
        }
    }
    let mut fields = Vec::with_capacity(header.len());
    let mut arrays: Vec<ArrayRef> = Vec::with_capacity(header.len());
    for (name, col) in header.iter().zip(cells) {
        if numeric.contains(&name.as_str()) {
            let vals: Vec<Option<f64>> = col
                .iter()
                .map(|v| if v.is_empty() { None } else { v.parse().ok() })
                .collect();
            fields.push(Field::new(name, DataType::Float64, true));
            arrays.push(Arc::new(Float64Array::from(vals)));
        } else {
            let vals: Vec<Option<&str>> = col
                .iter()
                .map(|v| (!v.is_empty()).then_some(v.as_str()))
                .collect();
            fields.push(Field::new(name, DataType::Utf8, true));
            arrays.push(Arc::new(StringArray::from(vals)));
        }
    }
    RecordBatch::try_new(Arc::new(Schema::new(fields)), arrays)
        .map_err(|e| Error::output(format!("cannot convert an output table: {e}")))
}

/// The columns of the output tables that hold numbers.
pub const NUMERIC_COLUMNS: &[&str] = &["weight", "confidence", "best_confidence"];

/// A record batch as the bytes of a Parquet file (Snappy-compressed; the same batch gives the
/// same bytes).
pub fn parquet_bytes(batch: &RecordBatch) -> Result<Vec<u8>> {
    use parquet::arrow::ArrowWriter;
    use parquet::basic::Compression;
    use parquet::file::properties::WriterProperties;
    let props = WriterProperties::builder()
        .set_compression(Compression::SNAPPY)
        .build();
    let fail = |e: parquet::errors::ParquetError| {
        Error::output(format!("cannot write a Parquet table: {e}"))
    };
    let mut out = Vec::new();
    let mut w = ArrowWriter::try_new(&mut out, batch.schema(), Some(props)).map_err(fail)?;
    w.write(batch).map_err(fail)?;
    w.close().map_err(fail)?;
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn dates_from_days() {
        // Reference values: the Unix epoch, and 2000-03-01 = day 11017 (common practice;
        // the same as Python's `date(2000, 3, 1) - date(1970, 1, 1)`).
        assert_eq!(date_text(0), "1970-01-01");
        assert_eq!(date_text(11_017), "2000-03-01");
        assert_eq!(date_text(-1), "1969-12-31");
        assert_eq!(date_text(-25_567), "1900-01-01");
    }

    #[test]
    fn timestamps_at_midnight_are_dates() {
        assert_eq!(
            timestamp_text(86_400 * 1_000_000_000, 1_000_000_000),
            "1970-01-02"
        );
        assert_eq!(timestamp_text(3_661, 1), "1970-01-01 01:01:01");
        assert_eq!(timestamp_text(1_500, 1_000), "1970-01-01 00:00:01.500");
    }

    #[test]
    fn numbers_as_csv_text() {
        assert_eq!(float_text(1.0), "1");
        assert_eq!(float_text(2.5), "2.5");
        assert_eq!(float_text(f64::NAN), "");
        assert_eq!(decimal_text(12_345, 2), "123.45");
        assert_eq!(decimal_text(-5, 3), "-0.005");
        assert_eq!(decimal_text(7, -2), "700");
    }
}
