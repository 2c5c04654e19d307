//! Parquet tables written atomically: under a temporary name, footer
//! written by `close()`, then renamed. A reader never sees a table without
//! its footer under the final name.

use crate::error::ContractError;
use arrow_array::RecordBatch;
use arrow_schema::SchemaRef;
use parquet::arrow::ArrowWriter;
use parquet::basic::Compression;
use parquet::file::metadata::KeyValue;
use parquet::file::properties::WriterProperties;
use std::fs::File;
use std::path::{Path, PathBuf};

/// Key of the Parquet key-value metadata entry naming the writing program.
pub const META_WRITER: &str = "spikeyard.writer";

/// A Parquet table being written; see the module docs.
pub struct TableWriter {
    final_path: PathBuf,
    temporary_path: PathBuf,
    writer: ArrowWriter<File>,
}

/// Rows per row group. The writer holds a row group's encoded columns
/// until it is complete: the library's default of about a million rows
/// would let a long recording's events or features grow the memory of the
/// stage writing them by a hundred MiB or more before the first flush.
const ROW_GROUP_ROWS: usize = 1 << 16;

impl TableWriter {
    /// Start writing `path` with `schema` and key-value `metadata`
    /// (for provenance: writer, versions, hashes).
    ///
    /// # Errors
    /// The temporary file cannot be created.
    pub fn create(path: &Path, schema: SchemaRef, metadata: &[(&str, String)]) -> Result<Self, ContractError> {
        let temporary_path = temporary_name(path);
        let file = File::create(&temporary_path).map_err(|e| ContractError::io(&temporary_path, e))?;
        let key_values = metadata.iter().map(|(k, v)| KeyValue::new(k.to_string(), v.clone())).collect();
        let properties = WriterProperties::builder()
            .set_compression(Compression::SNAPPY)
            .set_max_row_group_size(ROW_GROUP_ROWS)
            .set_key_value_metadata(Some(key_values))
            .build();
        let writer = ArrowWriter::try_new(file, schema, Some(properties))
            .map_err(|source| ContractError::Parquet { path: path.to_path_buf(), source })?;
        Ok(TableWriter { final_path: path.to_path_buf(), temporary_path, writer })
    }

    /// Append a batch.
    ///
    /// # Errors
    /// The batch does not match the schema, or writing fails.
    pub fn write(&mut self, batch: &RecordBatch) -> Result<(), ContractError> {
        self.writer.write(batch).map_err(|source| ContractError::Parquet { path: self.final_path.clone(), source })
    }

    /// Write the footer, sync, and rename to the final name.
    ///
    /// # Errors
    /// Writing the footer, syncing or renaming fails.
    pub fn finish(self) -> Result<PathBuf, ContractError> {
        let file = self
            .writer
            .into_inner()
            .map_err(|source| ContractError::Parquet { path: self.final_path.clone(), source })?;
        file.sync_all().map_err(|e| ContractError::io(&self.temporary_path, e))?;
        std::fs::rename(&self.temporary_path, &self.final_path).map_err(|e| ContractError::io(&self.final_path, e))?;
        Ok(self.final_path)
    }
}

fn temporary_name(path: &Path) -> PathBuf {
    let name = path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
    path.with_file_name(format!(".{name}.partial"))
}

/// Write one batch as a whole table.
///
/// # Errors
/// As [`TableWriter`].
pub fn write_table(path: &Path, batch: &RecordBatch, metadata: &[(&str, String)]) -> Result<PathBuf, ContractError> {
    let mut writer = TableWriter::create(path, batch.schema(), metadata)?;
    writer.write(batch)?;
    writer.finish()
}

/// Read a whole table into batches (small tables: QC, units, ground truth).
///
/// # Errors
/// The file is missing or not Parquet, with its path.
pub fn read_table(path: &Path) -> Result<Vec<RecordBatch>, ContractError> {
    let file = File::open(path).map_err(|e| ContractError::io(path, e))?;
    let reader = parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder::try_new(file)
        .and_then(|b| b.build())
        .map_err(|source| ContractError::Parquet { path: path.to_path_buf(), source })?;
    reader.collect::<Result<Vec<_>, _>>().map_err(|source| ContractError::Arrow { path: path.to_path_buf(), source })
}

/// A small table as one batch (a table of no rows as an empty batch of its schema).
///
/// # Errors
/// The file is missing or not Parquet, or a batch cannot be decoded.
pub fn read_whole_table(path: &Path) -> Result<RecordBatch, ContractError> {
    let file = File::open(path).map_err(|e| ContractError::io(path, e))?;
    let builder = parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder::try_new(file)
        .map_err(|source| ContractError::Parquet { path: path.to_path_buf(), source })?;
    let schema = builder.schema().clone();
    let reader = builder.build().map_err(|source| ContractError::Parquet { path: path.to_path_buf(), source })?;
    let batches = reader
        .collect::<Result<Vec<_>, _>>()
        .map_err(|source| ContractError::Arrow { path: path.to_path_buf(), source })?;
    arrow_select::concat::concat_batches(&schema, &batches)
        .map_err(|source| ContractError::Arrow { path: path.to_path_buf(), source })
}

/// Stream a table batch by batch (large tables: events, features, spikes).
///
/// # Errors
/// The file is missing or not Parquet, a batch cannot be decoded, or
/// `visit` fails.
pub fn for_each_batch<E: From<ContractError>>(
    path: &Path,
    mut visit: impl FnMut(&RecordBatch) -> Result<(), E>,
) -> Result<(), E> {
    let file = File::open(path).map_err(|e| ContractError::io(path, e))?;
    let parquet = |source| ContractError::Parquet { path: path.to_path_buf(), source };
    let reader = parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder::try_new(file)
        .map_err(parquet)?
        .with_batch_size(65536)
        .build()
        .map_err(parquet)?;
    for batch in reader {
        let batch = batch.map_err(|source| ContractError::Arrow { path: path.to_path_buf(), source })?;
        visit(&batch)?;
    }
    Ok(())
}

/// A column of a batch by name, downcast to `T`.
///
/// # Errors
/// [`ContractError::Format`] naming the table and the column when it is
/// missing or of another type.
pub fn column<'a, T: 'static>(path: &Path, batch: &'a RecordBatch, name: &str) -> Result<&'a T, ContractError> {
    let array = batch
        .column_by_name(name)
        .ok_or_else(|| ContractError::Format { path: path.to_path_buf(), message: format!("no column {name}") })?;
    array.as_any().downcast_ref::<T>().ok_or_else(|| ContractError::Format {
        path: path.to_path_buf(),
        message: format!("column {name} has type {}", array.data_type()),
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use arrow_array::{Float64Array, Int64Array};
    use arrow_schema::{DataType, Field, Schema};
    use std::sync::Arc;

    #[test]
    fn table_round_trips_with_metadata_and_leaves_no_partial_file() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("t.parquet");
        let schema = Arc::new(Schema::new(vec![
            Field::new("sample", DataType::Int64, false),
            Field::new("time_s", DataType::Float64, false),
        ]));
        let batch = RecordBatch::try_new(
            schema,
            vec![Arc::new(Int64Array::from(vec![1, 2])), Arc::new(Float64Array::from(vec![0.5, 1.0]))],
        )
        .unwrap();
        write_table(&path, &batch, &[(META_WRITER, "test".into())]).unwrap();
        let back = read_table(&path).unwrap();
        let samples: &Int64Array = column(&path, &back[0], "sample").unwrap();
        assert_eq!(samples.values().to_vec(), vec![1, 2]);
        assert!(column::<Int64Array>(&path, &back[0], "time_s").is_err());
        let names: Vec<_> =
            std::fs::read_dir(dir.path()).unwrap().map(|e| e.unwrap().file_name().into_string().unwrap()).collect();
        assert_eq!(names, vec!["t.parquet"]);
    }
}
