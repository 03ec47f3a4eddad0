//! Partitions whose Parquet schemas disagree are reported naming both files and the
//! columns that differ.

use arrow::array::{Int64Array, RecordBatch, StringArray};
use arrow::datatypes::{DataType, Field, Schema};
use daymark_store::{list_days, read_shape, resolve, DiscoverError};
use std::path::Path;
use std::sync::Arc;

fn write(path: &Path, batch: RecordBatch) {
    std::fs::create_dir_all(path.parent().unwrap()).unwrap();
    let mut w = parquet::arrow::ArrowWriter::try_new(
        std::fs::File::create(path).unwrap(),
        batch.schema(),
        None,
    )
    .unwrap();
    w.write(&batch).unwrap();
    w.close().unwrap();
}

#[tokio::test]
async fn disagreeing_partitions_name_both_files_and_the_column() {
    let dir = tempfile::tempdir().unwrap();
    let ids = Arc::new(StringArray::from(vec!["c1", "c2"]));
    let as_int = Schema::new(vec![
        Field::new("customer_id", DataType::Utf8, false),
        Field::new("seconds", DataType::Int64, false),
    ]);
    let as_text = Schema::new(vec![
        Field::new("customer_id", DataType::Utf8, false),
        Field::new("seconds", DataType::Utf8, false),
    ]);
    write(
        &dir.path().join("plays/dt=2026-01-01/a.parquet"),
        RecordBatch::try_new(
            Arc::new(as_int),
            vec![ids.clone(), Arc::new(Int64Array::from(vec![1, 2]))],
        )
        .unwrap(),
    );
    write(
        &dir.path().join("plays/dt=2026-01-02/b.parquet"),
        RecordBatch::try_new(
            Arc::new(as_text),
            vec![ids, Arc::new(StringArray::from(vec!["1", "2"]))],
        )
        .unwrap(),
    );
    let loc = resolve(&dir.path().join("plays").display().to_string(), None).unwrap();
    let listing = list_days(&loc, "dt").await.unwrap();
    assert_eq!(listing.days.len(), 2);
    let shape = read_shape(&loc, &listing).await;
    assert_eq!(shape.rows, 4);
    assert_eq!(shape.problems.len(), 1, "{:?}", shape.problems);
    let DiscoverError::SchemaMismatch {
        first,
        second,
        difference,
    } = &shape.problems[0]
    else {
        panic!("{:?}", shape.problems[0]);
    };
    assert!(first.ends_with("dt=2026-01-01/a.parquet"), "{first}");
    assert!(second.ends_with("dt=2026-01-02/b.parquet"), "{second}");
    assert_eq!(
        difference,
        "`seconds` is Int64 in one and Utf8 in the other"
    );
    let message = shape.problems[0].to_string();
    assert!(
        message.contains("a.parquet and ") && message.contains("b.parquet have different schemas"),
        "{message}"
    );
}
