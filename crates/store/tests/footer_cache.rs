//! The footer cache: a second look at a source reads only the footers of files that are
//! new or changed, and gives the same rows, schema and problems as reading every footer.

use arrow::array::{Int64Array, RecordBatch, StringArray};
use arrow::datatypes::{DataType, Field, Schema};
use daymark_store::object_store::path::Path as StorePath;
use daymark_store::{list_days, read_shape, read_shape_cached, resolve, FooterCache, FooterReads};
use daymark_store::{DiscoverError, Location, SourceShape};
use std::path::Path;
use std::sync::Arc;

/// Writes `n` rows with `seconds` as Int64 (or as text when `as_text`).
fn write(path: &Path, n: usize, as_text: bool) {
    std::fs::create_dir_all(path.parent().unwrap()).unwrap();
    let ids = Arc::new(StringArray::from(
        (0..n).map(|i| format!("c{i}")).collect::<Vec<_>>(),
    ));
    let (field, seconds): (Field, arrow::array::ArrayRef) = if as_text {
        (
            Field::new("seconds", DataType::Utf8, false),
            Arc::new(StringArray::from(vec!["1"; n])),
        )
    } else {
        (
            Field::new("seconds", DataType::Int64, false),
            Arc::new(Int64Array::from(vec![1; n])),
        )
    };
    let schema = Arc::new(Schema::new(vec![
        Field::new("customer_id", DataType::Utf8, false),
        field,
    ]));
    let batch = RecordBatch::try_new(schema.clone(), vec![ids, seconds]).unwrap();
    let mut w =
        parquet::arrow::ArrowWriter::try_new(std::fs::File::create(path).unwrap(), schema, None)
            .unwrap();
    w.write(&batch).unwrap();
    w.close().unwrap();
}

struct World {
    _dir: tempfile::TempDir,
    root: std::path::PathBuf,
    source: Location,
    cache: FooterCache,
}

fn world() -> World {
    let dir = tempfile::tempdir().unwrap();
    let root = dir.path().to_path_buf();
    for (day, rows) in [("2026-01-01", 3), ("2026-01-02", 5), ("2026-01-03", 7)] {
        write(
            &root.join(format!("plays/dt={day}/part-0.parquet")),
            rows,
            false,
        );
    }
    let source = resolve(&root.join("plays").display().to_string(), None).unwrap();
    let out = resolve(&root.join("out").display().to_string(), None).unwrap();
    std::fs::create_dir_all(root.join("out")).unwrap();
    let path = StorePath::from(format!("{}/_footers/plays.json", out.prefix));
    World {
        _dir: dir,
        root,
        source,
        cache: FooterCache { at: out, path },
    }
}

async fn both(w: &World) -> (SourceShape, SourceShape, FooterReads) {
    let listing = list_days(&w.source, "dt").await.unwrap();
    let plain = read_shape(&w.source, &listing).await;
    let (cached, reads) = read_shape_cached(&w.source, &listing, &w.cache).await;
    (plain, cached, reads)
}

fn same(a: &SourceShape, b: &SourceShape) {
    assert_eq!(a.rows, b.rows);
    assert_eq!(a.schema, b.schema);
    assert_eq!(
        a.problems.len(),
        b.problems.len(),
        "{:?} / {:?}",
        a.problems,
        b.problems
    );
}

#[tokio::test]
async fn second_look_reads_one_footer_and_new_files_only() {
    let w = world();
    let (plain, first, reads) = both(&w).await;
    same(&plain, &first);
    assert_eq!(first.rows, 15);
    assert_eq!(reads, FooterReads { read: 3, cached: 0 });
    assert!(w.root.join("out/_footers/plays.json").exists());

    // Unchanged: one footer read for the schema, the rows from the cache.
    let (plain, second, reads) = both(&w).await;
    same(&plain, &second);
    assert_eq!(reads, FooterReads { read: 1, cached: 3 });

    // A new day: its footer and the schema's.
    write(
        &w.root.join("plays/dt=2026-01-04/part-0.parquet"),
        11,
        false,
    );
    let (plain, third, reads) = both(&w).await;
    same(&plain, &third);
    assert_eq!(third.rows, 26);
    assert_eq!(reads, FooterReads { read: 2, cached: 3 });

    // A rewritten file (another size) is read again; its new row count counts.
    write(
        &w.root.join("plays/dt=2026-01-02/part-0.parquet"),
        50,
        false,
    );
    let (plain, fourth, reads) = both(&w).await;
    same(&plain, &fourth);
    assert_eq!(fourth.rows, 3 + 50 + 7 + 11);
    assert_eq!(reads, FooterReads { read: 2, cached: 3 });

    // A removed file no longer counts.
    std::fs::remove_file(w.root.join("plays/dt=2026-01-01/part-0.parquet")).unwrap();
    let (plain, fifth, reads) = both(&w).await;
    same(&plain, &fifth);
    assert_eq!(fifth.rows, 50 + 7 + 11);
    assert_eq!(reads, FooterReads { read: 1, cached: 3 });
}

#[tokio::test]
async fn a_disagreeing_file_is_reported_on_every_look() {
    let w = world();
    let _ = both(&w).await;
    write(&w.root.join("plays/dt=2026-01-04/part-0.parquet"), 2, true);
    for _ in 0..2 {
        let (plain, cached, reads) = both(&w).await;
        same(&plain, &cached);
        assert_eq!(reads, FooterReads { read: 2, cached: 3 });
        let [DiscoverError::SchemaMismatch {
            second, difference, ..
        }] = &cached.problems[..]
        else {
            panic!("expected one schema mismatch: {:?}", cached.problems)
        };
        assert!(second.ends_with("dt=2026-01-04/part-0.parquet"), "{second}");
        assert!(
            difference.contains("`seconds` is Int64 in one and Utf8"),
            "{difference}"
        );
    }
}

#[tokio::test]
async fn a_damaged_cache_or_one_of_another_source_is_ignored() {
    let w = world();
    let _ = both(&w).await;
    let file = w.root.join("out/_footers/plays.json");
    std::fs::write(&file, b"{ not json").unwrap();
    let (plain, cached, reads) = both(&w).await;
    same(&plain, &cached);
    assert_eq!(reads, FooterReads { read: 3, cached: 0 });
    // Rewritten whole by that look.
    let (_, _, reads) = both(&w).await;
    assert_eq!(reads, FooterReads { read: 1, cached: 3 });
    // The same cache file read for a source at another location: not used.
    let text = std::fs::read_to_string(&file).unwrap();
    let moved = text.replace(&w.source.display(), "/somewhere/else");
    std::fs::write(&file, moved).unwrap();
    let (_, _, reads) = both(&w).await;
    assert_eq!(reads, FooterReads { read: 3, cached: 0 });
}
