//! Tables across the boundary, by the Arrow C stream interface (the `__arrow_c_stream__`
//! PyCapsule protocol): in, any object that offers it (pyarrow tables and batches, polars
//! and pandas >= 2.2 frames); out, a [`Stream`] that pyarrow, polars and pandas can import.
//! No cell becomes a Python object on the way.

use arrow_array::ffi_stream::{FFI_ArrowArrayStream, RecordBatchStreamReader};
use arrow_array::{RecordBatch, RecordBatchIterator, RecordBatchReader};
use arrow_schema::SchemaRef;
use dovetail::config::Config;
use dovetail::io::Table;
use dovetail::{pipeline, tabular, Result};
use pyo3::exceptions::{PyTypeError, PyValueError};
use pyo3::prelude::*;
use pyo3::types::{PyCapsule, PyString};
use std::ffi::CStr;
use std::path::PathBuf;
use std::sync::Mutex;

const STREAM: &CStr = c"arrow_array_stream";

/// One table as given: a file to read as the CLI reads it, or record batches from a frame.
pub enum Source {
    /// A CSV or Parquet file.
    Path(PathBuf),
    /// The batches of a frame, with their schema.
    Frame {
        schema: SchemaRef,
        batches: Vec<RecordBatch>,
    },
}

/// The name a frame goes by in messages and in summary.json's manifest.
pub fn label(left: bool) -> PathBuf {
    PathBuf::from(if left {
        "<left table>"
    } else {
        "<right table>"
    })
}

/// What `obj` is: a path (`str` or `os.PathLike`, made a string by the Python side) or an
/// object with `__arrow_c_stream__`, read whole here (with the GIL: the producer may be
/// Python code).
pub fn source(py: Python<'_>, obj: &Bound<'_, PyAny>, left: bool) -> PyResult<Source> {
    if let Ok(s) = obj.cast::<PyString>() {
        return Ok(Source::Path(PathBuf::from(s.to_cow()?.into_owned())));
    }
    if !obj.hasattr("__arrow_c_stream__")? {
        let side = if left { "left" } else { "right" };
        return Err(PyTypeError::new_err(format!(
            "{side}: give a pandas or polars DataFrame, a pyarrow Table or a file path (CSV or Parquet), not {}",
            obj.get_type().name()?
        )));
    }
    let capsule = obj.call_method1("__arrow_c_stream__", (py.None(),))?;
    let capsule = capsule
        .cast::<PyCapsule>()
        .map_err(|_| PyTypeError::new_err("__arrow_c_stream__ did not return a PyCapsule"))?;
    let ptr = capsule.pointer_checked(Some(STREAM))?;
    // SAFETY: the capsule is named `arrow_array_stream`, so by the protocol it points to a
    // valid FFI_ArrowArrayStream; `from_raw` moves the stream out and leaves a released one
    // behind, which the capsule's destructor then skips.
    let reader = unsafe { RecordBatchStreamReader::from_raw(ptr.as_ptr().cast()) }
        .map_err(|e| PyValueError::new_err(format!("cannot read the Arrow stream: {e}")))?;
    let schema = reader.schema();
    let batches = reader
        .collect::<std::result::Result<Vec<_>, _>>()
        .map_err(|e| PyValueError::new_err(format!("cannot read the Arrow stream: {e}")))?;
    Ok(Source::Frame { schema, batches })
}

/// The [`Table`] of one side from its frame, checked as a file is (see
/// [`tabular::table_from_batches`]); a side given as a path is read as the CLI reads it.
pub fn table(source: Option<Source>, config: &Config, left: bool) -> Result<Table> {
    match source {
        Some(Source::Frame { schema, batches }) => {
            let spec = pipeline::read_spec(config, left)?;
            tabular::table_from_batches(&schema, &batches, &label(left), &spec)
        }
        Some(Source::Path(_)) | None => pipeline::read_side(config, left),
    }
}

/// A table on its way out: Arrow data that Python takes by `__arrow_c_stream__` (once).
#[pyclass(module = "dovetail._dovetail", frozen)]
pub struct Stream {
    batch: Mutex<Option<RecordBatch>>,
}

impl Stream {
    pub fn new(batch: RecordBatch) -> Stream {
        Stream {
            batch: Mutex::new(Some(batch)),
        }
    }
}

#[pymethods]
impl Stream {
    /// The Arrow C stream of the table, in a PyCapsule (the Arrow PyCapsule interface).
    #[pyo3(signature = (requested_schema = None))]
    fn __arrow_c_stream__<'py>(
        &self,
        py: Python<'py>,
        requested_schema: Option<Bound<'py, PyAny>>,
    ) -> PyResult<Bound<'py, PyCapsule>> {
        let _ = requested_schema;
        let batch = self
            .batch
            .lock()
            .map_err(|_| PyValueError::new_err("the stream is unusable"))?
            .take()
            .ok_or_else(|| PyValueError::new_err("the stream was already taken"))?;
        let schema = batch.schema();
        let reader: Box<dyn RecordBatchReader + Send> =
            Box::new(RecordBatchIterator::new(vec![Ok(batch)], schema));
        PyCapsule::new_with_value(py, FFI_ArrowArrayStream::new(reader), STREAM)
    }
}
