//! The tiled engine equals the naive path (raw events filtered per snapshot, the in-project
//! oracle) for every day of a backfill, in both knowledge modes, across a daylight-saving
//! change, with late arrivals and re-deliveries; and tiles read each raw partition once.

use arrow::array::{Array, AsArray, RecordBatch};
use arrow::compute::concat_batches;
use arrow::datatypes::{DataType, Float64Type};
use arrow::util::display::array_value_to_string;
use chrono::NaiveDate;
use daymark_engine::backfill::{
    build_days, day_by_day_limit, direct_features, key_ranges, range_query, tile_rows_read,
    tile_types, KeyRange,
};
use daymark_engine::rollups::{plan_day, Level};
use daymark_engine::tiles::{layouts, prepare, tiled_snapshot_query};
use daymark_engine::{inspect_sources, register_sources, snapshot_query};
use daymark_spec::Knowledge;
use daymark_worldgen::{generate, WorldConfig};
use std::path::{Path, PathBuf};

/// The crate's folder, read when the test runs (`cargo test` sets it): a test binary
/// reused from a shared target folder keeps the compile-time path of the checkout that
/// built it, which may be gone.
fn manifest_dir() -> String {
    std::env::var("CARGO_MANIFEST_DIR").unwrap_or_else(|_| env!("CARGO_MANIFEST_DIR").into())
}

fn day(s: &str) -> NaiveDate {
    s.parse().unwrap()
}

fn demo_pipeline(world: &Path, out: &Path) -> daymark_spec::Pipeline {
    demo_pipeline_with(world, out, "")
}

/// The demo pipeline with `features` (YAML list items) added after its own.
fn demo_pipeline_with(world: &Path, out: &Path, features: &str) -> daymark_spec::Pipeline {
    let text =
        std::fs::read_to_string(PathBuf::from(manifest_dir()).join("../../pipelines/demo.yaml"))
            .unwrap();
    assert!(text.contains("\nlabel:"));
    let text = text
        .replace("\nlabel:", &format!("{features}\nlabel:"))
        .replace("../demo-data/world/", &format!("{}/", world.display()))
        .replace(
            "output: ../demo-data/out",
            &format!("output: {}", out.display()),
        );
    daymark_spec::load_str(&text, None).unwrap()
}

async fn run(ctx: &datafusion::prelude::SessionContext, sql: &str) -> RecordBatch {
    let batches = ctx.sql(sql).await.unwrap().collect().await.unwrap();
    concat_batches(&batches[0].schema(), &batches).unwrap()
}

/// The rows of snapshot `d` in the result of a range query.
fn rows_of_day(all: &RecordBatch, d: NaiveDate) -> RecordBatch {
    use arrow::datatypes::Date32Type;
    let epoch = NaiveDate::from_ymd_opt(1970, 1, 1).unwrap();
    let n = (d - epoch).num_days() as i32;
    let dates = all
        .column_by_name("snapshot_date")
        .unwrap()
        .as_primitive::<Date32Type>();
    let mask: arrow::array::BooleanArray = dates.iter().map(|v| Some(v == Some(n))).collect();
    arrow::compute::filter_record_batch(all, &mask).unwrap()
}

/// The range `days` cut into key ranges of about `rows` working-set rows (at least 3),
/// each range's query run on its own.
async fn key_range_results(
    ctx: &datafusion::prelude::SessionContext,
    pipeline: &daymark_spec::Pipeline,
    ls: &std::collections::BTreeMap<String, daymark_engine::tiles::TileLayout>,
    (first, last): (NaiveDate, NaiveDate),
    mode: Option<Knowledge>,
    types: &daymark_engine::backfill::TileTypes,
    rows: u64,
) -> Vec<RecordBatch> {
    let ranges = key_ranges(ctx, pipeline, ls, first, last, mode, rows)
        .await
        .unwrap();
    assert!(ranges.len() >= 3, "{ranges:?}");
    let mut parts = Vec::new();
    for r in &ranges {
        parts.push(run(ctx, &range_query(pipeline, ls, first, last, mode, types, r)).await);
    }
    parts
}

/// The rows of snapshot `d` in key-range results, one range after the other.
fn rows_of_day_in_parts(parts: &[RecordBatch], d: NaiveDate) -> RecordBatch {
    let of_day: Vec<RecordBatch> = parts.iter().map(|p| rows_of_day(p, d)).collect();
    concat_batches(&of_day[0].schema(), &of_day).unwrap()
}

/// Equal cell by cell; floats to 1e-9 relative (sums are added in another order).
fn assert_same(a: &RecordBatch, b: &RecordBatch, what: &str) {
    assert_eq!(a.num_rows(), b.num_rows(), "{what}: row counts");
    assert_eq!(
        a.schema().fields().len(),
        b.schema().fields().len(),
        "{what}: columns"
    );
    // Text as string views or plain strings is the same text (the written snapshot holds
    // plain strings either way).
    let text = |t: &DataType| match t {
        DataType::Utf8View => DataType::Utf8,
        t => t.clone(),
    };
    for (i, field) in a.schema().fields().iter().enumerate() {
        let (x, y) = (a.column(i), b.column(i));
        assert_eq!(
            text(x.data_type()),
            text(y.data_type()),
            "{what}: type of {}",
            field.name()
        );
        for r in 0..a.num_rows() {
            let same = if x.data_type() == &DataType::Float64 {
                let (p, q) = (
                    x.as_primitive::<Float64Type>(),
                    y.as_primitive::<Float64Type>(),
                );
                match (p.is_null(r), q.is_null(r)) {
                    (true, true) => true,
                    (false, false) => {
                        let (u, v) = (p.value(r), q.value(r));
                        (u - v).abs() <= 1e-9 * u.abs().max(v.abs()).max(1e-3)
                    }
                    _ => false,
                }
            } else {
                x.is_null(r) == y.is_null(r)
                    && array_value_to_string(x, r).unwrap() == array_value_to_string(y, r).unwrap()
            };
            assert!(
                same,
                "{what}: row {r} column {}: {} vs {}",
                field.name(),
                array_value_to_string(x, r).unwrap(),
                array_value_to_string(y, r).unwrap()
            );
        }
    }
}

/// Rows of the Parquet files under `dir` and its sub-folders, from their footers.
fn parquet_rows_under(dir: &str) -> u64 {
    let mut rows = 0;
    let Ok(entries) = std::fs::read_dir(dir) else {
        return 0;
    };
    for e in entries.flatten() {
        let p = e.path();
        if p.is_dir() {
            rows += parquet_rows_under(p.to_str().unwrap());
        } else if p.extension().is_some_and(|x| x == "parquet") {
            let file = std::fs::File::open(&p).unwrap();
            let reader = parquet::file::reader::SerializedFileReader::new(file).unwrap();
            use parquet::file::reader::FileReader;
            rows += reader.metadata().file_metadata().num_rows() as u64;
        }
    }
    rows
}

/// The published snapshots of `days` in `out` hold the rows of `all` of their day.
fn read_back(out: &daymark_store::Location, days: &[NaiveDate], all: &RecordBatch, what: &str) {
    for d in days {
        let path = daymark_engine::build::snapshot_path(out, None, *d);
        let file =
            std::fs::File::open(format!("/{path}")).unwrap_or_else(|e| panic!("{path}: {e}"));
        let reader = parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder::try_new(file)
            .unwrap()
            .build()
            .unwrap();
        let schema = arrow::record_batch::RecordBatchReader::schema(&reader);
        let batches: Vec<RecordBatch> = reader.map(Result::unwrap).collect();
        let expected = rows_of_day(all, *d);
        let got = concat_batches(&schema, &batches).unwrap();
        assert_same(&expected, &got, &format!("{what} {d}"));
    }
}

/// `build_days` in a session with a memory limit and a small working set per query: a
/// range longer than its day-by-day limit is cut into ranges of keys, each spilled and
/// merged back by day, a short one is built day by day (set-based too when the pipeline
/// takes the windowed totals); both publish, for each day, the rows of the one-query
/// result `all`.
async fn range_under_memory_limit(
    pipeline: &daymark_spec::Pipeline,
    reports: &std::collections::BTreeMap<String, daymark_engine::SourceReport>,
    ls: &std::collections::BTreeMap<String, daymark_engine::tiles::TileLayout>,
    out: &daymark_store::Location,
    days: &[NaiveDate],
    all: &RecordBatch,
) {
    let opts = daymark_engine::session::EngineOptions {
        memory_limit: Some(64 << 20),
        backfill_rows_per_query: Some(4_000),
        ..Default::default()
    };
    let ctx = daymark_engine::session::session(&opts).unwrap();
    register_sources(&ctx, pipeline, reports).await.unwrap();
    let stats = prepare(&ctx, pipeline, reports, ls, out, days, None)
        .await
        .unwrap();
    assert!(
        stats.values().all(|s| s.partitions_built == 0),
        "tiles reused"
    );
    // `build_days` builds a range day by day up to its limit (the tile rows the set-based
    // query would read over a number of rows per day), longer ones set-based. This world
    // is small, so a session is told a third of the rows a 3-day range reads.
    let (first, last) = (days[0], *days.last().unwrap());
    let short = &days[..3];
    let rows = tile_rows_read(&ctx, pipeline, ls, first, short[2], None)
        .await
        .unwrap();
    // At most every tile row on disk (a range reads partitions up to its last day).
    let on_disk: u64 = ls
        .values()
        .flat_map(|l| {
            std::iter::once(l.dir(out))
                .chain(l.distinct.iter().map(|(i, _, _)| l.distinct_dir(out, *i)))
        })
        .map(|d| parquet_rows_under(&format!("/{d}")))
        .sum();
    assert!(rows > 3_000 && rows <= on_disk, "{rows} of {on_disk}");
    let by_day_ctx = daymark_engine::session::session(&daymark_engine::session::EngineOptions {
        tile_rows_per_day_by_day: Some(rows / 3),
        ..opts
    })
    .unwrap();
    register_sources(&by_day_ctx, pipeline, reports)
        .await
        .unwrap();
    prepare(&by_day_ctx, pipeline, reports, ls, out, days, None)
        .await
        .unwrap();
    let limit = |last| day_by_day_limit(&by_day_ctx, pipeline, ls, first, last, None);
    assert_eq!(limit(short[2]).await.unwrap(), 3);
    assert!(limit(last).await.unwrap() < days.len() as u64);
    let mut published = 0;
    let day_reports = build_days(
        &by_day_ctx,
        pipeline,
        reports,
        ls,
        out,
        days,
        None,
        None,
        |_| published += 1,
    )
    .await
    .unwrap();
    assert_eq!(published, days.len());
    assert!(
        day_reports.iter().all(|r| r.queries >= 3),
        "{:?}",
        day_reports[0]
    );
    read_back(out, days, all, "memory-limited build");
    let by_day = build_days(
        &by_day_ctx,
        pipeline,
        reports,
        ls,
        out,
        short,
        None,
        None,
        |_| {},
    )
    .await
    .unwrap();
    assert_eq!(by_day.len(), short.len());
    if direct_features(pipeline, &tile_types(&by_day_ctx, ls).await) {
        // One query per range of keys (fewer rows than the whole range: at least two).
        assert!(by_day.iter().all(|r| r.queries >= 2), "{:?}", by_day[0]);
    } else {
        assert!(by_day.iter().all(|r| r.queries == 1), "{:?}", by_day[0]);
    }
    read_back(out, short, all, "day by day");
    // The daily build of the last day under the limit builds its week and month roll-ups
    // one span per query (the days after reuse them without a limit, checked against the
    // naive path there) and gives the same rows.
    let last = *days.last().unwrap();
    let (stats, plan) = plan_day(&ctx, pipeline, reports, ls, out, last, None)
        .await
        .unwrap();
    assert!(stats["plays"].rollups_built >= 2, "{stats:?}");
    // The snapshot reads a table over only the tile partitions of its day pieces (a row of
    // event day d sits in the partitions of d - 1, d and d + 1), not the whole folder.
    let pieces = &plan.sources["plays"];
    let wanted: std::collections::BTreeSet<String> = pieces
        .days
        .iter()
        .flat_map(|d| {
            [
                *d - chrono::Duration::days(1),
                *d,
                *d + chrono::Duration::days(1),
            ]
        })
        .map(|d| format!("dt={d}/"))
        .collect();
    assert!(pieces.scoped && !wanted.is_empty());
    // (Under the view that shows the tiles' shared columns under every feature's name.)
    let scoped = daymark_engine::tiles::listing_of(
        &ctx,
        &daymark_engine::rollups::scoped_table(&ls["plays"].table(), last),
    )
    .await
    .unwrap();
    let listing = scoped
        .downcast_ref::<datafusion::datasource::listing::ListingTable>()
        .unwrap();
    let got: std::collections::BTreeSet<String> = listing
        .table_paths()
        .iter()
        .map(|u| u.as_str().rsplit('/').nth(1).unwrap().to_string() + "/")
        .collect();
    assert_eq!(got, wanted);
    let tiled = run(&ctx, &tiled_snapshot_query(pipeline, ls, &plan, None).sql).await;
    assert_same(
        &rows_of_day(all, last),
        &tiled,
        &format!("memory-limited daily build {last}"),
    );
}

/// A 120-day backfill (2026-02-16 to 2026-06-15, across the daylight-saving change of
/// 2026-03-08 in America/Chicago) of a small demo world with late arrivals and
/// re-deliveries: the set-based range query (every demo feature through the windowed
/// totals, `window_totals.rs`) equals the naive path for every cell of every day in both
/// knowledge modes, and so does the per-day tiled query (the daily build) on every fifth
/// day and the days around the change.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn tiled_equals_naive_for_every_day_in_both_modes() {
    let dir = tempfile::tempdir().unwrap();
    let world = dir.path().join("world");
    let mut cfg = WorldConfig::new(&world, 120, 140);
    cfg.start = day("2026-02-01");
    cfg.seed = 4;
    generate(&cfg).unwrap();
    let pipeline = demo_pipeline(&world, &dir.path().join("out"));
    let reports = inspect_sources(&pipeline).await;
    let out = daymark_store::resolve(&dir.path().join("out").display().to_string(), None).unwrap();
    let ctx = daymark_engine::session::session(&Default::default()).unwrap();
    register_sources(&ctx, &pipeline, &reports).await.unwrap();
    let ls = layouts(&pipeline);

    let (first, last) = (day("2026-02-16"), day("2026-06-15"));
    let days: Vec<NaiveDate> = first.iter_days().take_while(|d| *d <= last).collect();
    assert_eq!(days.len(), 120);
    let stats = prepare(&ctx, &pipeline, &reports, &ls, &out, &days, None)
        .await
        .unwrap();
    // Each raw partition that any day needs was read once, and all of its files.
    for (source, s) in &stats {
        let r = &reports[source];
        // A snapshot's cutoff falls inside the next day's partition.
        let partitions: Vec<_> = r
            .listing
            .days
            .keys()
            .filter(|d| **d <= day("2026-06-16"))
            .collect();
        let files: usize = partitions.iter().map(|d| r.listing.days[*d].len()).sum();
        assert_eq!(s.partitions_built as usize, partitions.len(), "{source}");
        assert_eq!(s.raw_files as usize, files, "{source}");
        assert_eq!(s.partitions_reused, 0);
    }
    let mut population = 0;
    // Days on which the two modes disagree: late rows are in the world and matter.
    let mut as_known: Vec<RecordBatch> = Vec::new();
    let mut modes_differ = 0;
    let mut levels_used = std::collections::BTreeSet::new();
    let floats = tile_types(&ctx, &ls).await;
    // Every feature of the demo takes the windowed totals.
    assert!(direct_features(&pipeline, &floats));
    for mode in [None, Some(Knowledge::EventTime)] {
        // The whole range as one set-based query (what a backfill runs).
        let sql = range_query(&pipeline, &ls, first, last, mode, &floats, &KeyRange::all());
        assert!(sql.contains("daymark_window_totals"), "{sql}");
        // The session's physical rule groups the keys' rows in one phase.
        let plan = run(&ctx, &format!("EXPLAIN {sql}")).await;
        let plan = arrow::util::pretty::pretty_format_batches(&[plan])
            .unwrap()
            .to_string();
        assert!(plan.contains("mode=SinglePartitioned"), "{plan}");
        let range = run(&ctx, &sql).await;
        if mode.is_none() {
            // Cut into ranges of keys (what a backfill too large for memory runs): the
            // ranges' rows of each day, one range after the other, are the whole query's
            // rows of that day in the same (key) order.
            let parts =
                key_range_results(&ctx, &pipeline, &ls, (first, last), mode, &floats, 15_000).await;
            for d in &days {
                assert_same(
                    &rows_of_day(&range, *d),
                    &rows_of_day_in_parts(&parts, *d),
                    &format!("key ranges {d}"),
                );
            }
            range_under_memory_limit(&pipeline, &reports, &ls, &out, &days[..40], &range).await;
        }
        for (n, d) in days.iter().enumerate() {
            let naive = run(&ctx, &snapshot_query(&pipeline, *d, mode).sql).await;
            assert_same(
                &naive,
                &rows_of_day(&range, *d),
                &format!("range {d} {mode:?}"),
            );
            if n % 5 == 0 || (day("2026-03-07")..=day("2026-03-09")).contains(d) || *d == last {
                // The daily build: the day's pieces (tiles at the window edges, week and
                // month roll-ups between, built on first use).
                let (_, plan) = plan_day(&ctx, &pipeline, &reports, &ls, &out, *d, mode)
                    .await
                    .unwrap();
                for p in plan.sources.values() {
                    for s in &p.spans {
                        levels_used.insert((s.level, mode.is_none()));
                    }
                }
                let tiled = run(&ctx, &tiled_snapshot_query(&pipeline, &ls, &plan, mode).sql).await;
                assert_same(&naive, &tiled, &format!("{d} {mode:?}"));
            }
            population += naive.num_rows();
            if mode.is_none() {
                as_known.push(naive);
            } else if as_known[n] != naive {
                modes_differ += 1;
            }
        }
    }
    // Weeks, months and histories were all used, in both modes.
    for level in [Level::Week, Level::Month, Level::History] {
        for as_known in [false, true] {
            assert!(
                levels_used.contains(&(level, as_known)),
                "{level:?} {as_known}: {levels_used:?}"
            );
        }
    }
    assert!(population > 10_000, "{population}");
    assert!(modes_differ > 10, "{modes_differ}");

    // The next daily build reads no raw partition (the backfill's tiles cover all it
    // needs), and the one after reads only the partition it has not seen; both read a
    // few dozen tile partitions and roll-ups, not one partition per day of their windows
    // (91 days for plays, all history for subscriptions).
    let (stats, _) = plan_day(
        &ctx,
        &pipeline,
        &reports,
        &ls,
        &out,
        day("2026-06-16"),
        None,
    )
    .await
    .unwrap();
    for (source, s) in &stats {
        assert_eq!(s.partitions_built, 0, "{source}");
        assert_eq!(s.raw_files, 0, "{source}");
    }
    let (stats, plan) = plan_day(
        &ctx,
        &pipeline,
        &reports,
        &ls,
        &out,
        day("2026-06-17"),
        None,
    )
    .await
    .unwrap();
    for (source, s) in &stats {
        let files = reports[source].listing.days.get(&day("2026-06-17"));
        assert_eq!(s.partitions_built, files.is_some() as u64, "{source}");
        assert_eq!(s.raw_files as usize, files.map_or(0, Vec::len), "{source}");
        // Under half of the 91 days of plays' longest window (subscriptions and support
        // read all 138 days of history).
        let touched = s.partitions_built + s.partitions_reused;
        assert!(touched <= 45, "{source}: {touched} tile partitions");
        assert!(s.rollups_reused > 0, "{source}: {s:?}");
    }
    assert_eq!(stats["plays"].partitions_built, 1, "plays lands every day");
    // Whole months of plays between the window edges come from roll-ups.
    let plays = &plan.sources["plays"];
    assert!(
        plays
            .spans
            .iter()
            .any(|s| s.level == Level::Month && s.first == day("2026-04-01")),
        "{plays:?}"
    );
    let naive = run(
        &ctx,
        &snapshot_query(&pipeline, day("2026-06-17"), None).sql,
    )
    .await;
    let tiled = run(&ctx, &tiled_snapshot_query(&pipeline, &ls, &plan, None).sql).await;
    assert_same(&naive, &tiled, "2026-06-17");
}

/// The demo pipeline with a greatest text value added (the alphabetically last genre
/// played in 28 days), which the windowed totals do not take, runs the backfill's general
/// query (+/- rows, running values and range frames over a spine of days); it equals the
/// naive path for every cell of 60 days, across the daylight-saving change, in both
/// knowledge modes, with late arrivals and re-deliveries, also cut into ranges of keys,
/// and built by `build_days` with and without a memory limit.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn general_range_query_equals_naive_for_every_day_in_both_modes() {
    let dir = tempfile::tempdir().unwrap();
    let world = dir.path().join("world");
    let mut cfg = WorldConfig::new(&world, 120, 100);
    cfg.start = day("2026-02-01");
    cfg.seed = 9;
    generate(&cfg).unwrap();
    let pipeline = demo_pipeline_with(
        &world,
        &dir.path().join("out"),
        "
  - name: last_genre_name_28d
    source: plays
    agg: max
    expr: genre
    window: 28d
    fill: null",
    );
    let reports = inspect_sources(&pipeline).await;
    let out = daymark_store::resolve(&dir.path().join("out").display().to_string(), None).unwrap();
    let ctx = daymark_engine::session::session(&Default::default()).unwrap();
    register_sources(&ctx, &pipeline, &reports).await.unwrap();
    let (first, last) = (day("2026-02-20"), day("2026-04-20"));
    let days: Vec<NaiveDate> = first.iter_days().take_while(|d| *d <= last).collect();
    let ls = layouts(&pipeline);
    prepare(&ctx, &pipeline, &reports, &ls, &out, &days, None)
        .await
        .unwrap();
    let types = tile_types(&ctx, &ls).await;
    assert!(!direct_features(&pipeline, &types));
    let mut modes_differ = 0;
    let mut population = 0;
    let mut as_known: Vec<RecordBatch> = Vec::new();
    for mode in [None, Some(Knowledge::EventTime)] {
        let sql = range_query(&pipeline, &ls, first, last, mode, &types, &KeyRange::all());
        assert!(!sql.contains("daymark_window_totals"), "{sql}");
        let range = run(&ctx, &sql).await;
        if mode.is_none() {
            // (First: it checks that its daily build makes roll-ups.)
            range_under_memory_limit(&pipeline, &reports, &ls, &out, &days[..40], &range).await;
            // Every published snapshot holds its day's rows of the query, in order.
            let mut published = 0;
            build_days(
                &ctx,
                &pipeline,
                &reports,
                &ls,
                &out,
                &days,
                mode,
                None,
                |_| published += 1,
            )
            .await
            .unwrap();
            assert_eq!(published, days.len());
            read_back(&out, &days, &range, "general backfill");
        }
        let parts =
            key_range_results(&ctx, &pipeline, &ls, (first, last), mode, &types, 3_000).await;
        for (n, d) in days.iter().enumerate() {
            let naive = run(&ctx, &snapshot_query(&pipeline, *d, mode).sql).await;
            assert_same(
                &naive,
                &rows_of_day(&range, *d),
                &format!("general {d} {mode:?}"),
            );
            assert_same(
                &naive,
                &rows_of_day_in_parts(&parts, *d),
                &format!("general, key ranges {d} {mode:?}"),
            );
            population += naive.num_rows();
            if mode.is_none() {
                as_known.push(naive);
            } else if as_known[n] != naive {
                modes_differ += 1;
            }
        }
    }
    assert!(population > 5_000, "{population}");
    assert!(modes_differ > 5, "{modes_differ}");
}

/// The daily build of `d`: plans its pieces (building what they need), then runs the
/// query; returns the stats of the plan, whether plays came partly from a roll-up, and the
/// snapshot.
async fn daily(
    ctx: &datafusion::prelude::SessionContext,
    pipeline: &daymark_spec::Pipeline,
    reports: &std::collections::BTreeMap<String, daymark_engine::sources::SourceReport>,
    ls: &std::collections::BTreeMap<String, daymark_engine::tiles::TileLayout>,
    out: &daymark_store::Location,
    d: NaiveDate,
    mode: Option<Knowledge>,
) -> (
    std::collections::BTreeMap<String, daymark_engine::tiles::TileStats>,
    bool,
    RecordBatch,
) {
    let (stats, plan) = plan_day(ctx, pipeline, reports, ls, out, d, mode)
        .await
        .unwrap();
    let rolled = !plan.sources["plays"].spans.is_empty();
    let rows = run(ctx, &tiled_snapshot_query(pipeline, ls, &plan, mode).sql).await;
    (stats, rolled, rows)
}

/// A late file (new events of an old day that arrived after the daily runs that could have
/// seen them) rebuilds only its raw partition's tile and the roll-up of its week, changes
/// event-time snapshots only, and both modes still equal the naive path. Checked on
/// 2026-05-15 (the late day is a day piece) and 2026-05-19 (it is inside the week
/// 2026-05-04..10 that plays reads as a roll-up).
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_late_file_rebuilds_only_its_partition_and_changes_only_event_time_views() {
    let dir = tempfile::tempdir().unwrap();
    let world = dir.path().join("world");
    let mut cfg = WorldConfig::new(&world, 200, 20);
    cfg.start = day("2026-05-01");
    generate(&cfg).unwrap();
    let pipeline = demo_pipeline(&world, &dir.path().join("out"));
    let out = daymark_store::resolve(&dir.path().join("out").display().to_string(), None).unwrap();
    let ls = layouts(&pipeline);
    let (snapshot, later) = (day("2026-05-15"), day("2026-05-19"));
    let (as_known_mode, event_mode) = (None, Some(Knowledge::EventTime));

    let reports = inspect_sources(&pipeline).await;
    let ctx = daymark_engine::session::session(&Default::default()).unwrap();
    register_sources(&ctx, &pipeline, &reports).await.unwrap();
    let (_, rolled, as_known) = daily(
        &ctx,
        &pipeline,
        &reports,
        &ls,
        &out,
        snapshot,
        as_known_mode,
    )
    .await;
    assert!(!rolled, "05-15: every plays day is a day piece");
    assert_tiles_sorted_by_key(&dir.path().join("out/tiles"), false);
    let (stats, _, event_time) =
        daily(&ctx, &pipeline, &reports, &ls, &out, snapshot, event_mode).await;
    // The same partitions again: every marker comes from the folders' marker indexes.
    for (source, s) in &stats {
        assert_eq!(s.markers_read, 0, "{source}: {s:?}");
    }
    let (stats, rolled, later_before) =
        daily(&ctx, &pipeline, &reports, &ls, &out, later, event_mode).await;
    assert!(rolled, "05-19: plays reads the week of 05-04 as a roll-up");
    assert!(stats["plays"].rollups_built >= 1, "{stats:?}");
    assert_tiles_sorted_by_key(&dir.path().join("out/tiles"), true);

    // Re-deliver a whole on-time file of 2026-05-10 as if it had arrived now (a late file
    // with new ids: new events of that day that the daily run on 05-15 could not have seen).
    let part = world.join("plays/dt=2026-05-10");
    let src = std::fs::read_dir(&part)
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| p.to_string_lossy().contains("arrived-2026-05-10"))
        .unwrap();
    rewrite_as_late(&src, &part.join("arrived-2026-05-16-9.parquet"));

    let reports = inspect_sources(&pipeline).await;
    let ctx = daymark_engine::session::session(&Default::default()).unwrap();
    register_sources(&ctx, &pipeline, &reports).await.unwrap();
    let (stats, _, as_known_after) = daily(
        &ctx,
        &pipeline,
        &reports,
        &ls,
        &out,
        snapshot,
        as_known_mode,
    )
    .await;
    assert_eq!(
        stats["plays"].partitions_built, 1,
        "only the partition that changed"
    );
    // Its marker index entry no longer matches its files: its own marker is read (and
    // does not match either); every other partition is checked from the index.
    assert_eq!(stats["plays"].markers_read, 1, "{stats:?}");
    assert_eq!(
        stats["subscriptions"].markers_read + stats["support"].markers_read,
        0,
        "{stats:?}"
    );
    assert_eq!(
        stats["subscriptions"].partitions_built + stats["support"].partitions_built,
        0
    );
    let (_, _, event_time_after) =
        daily(&ctx, &pipeline, &reports, &ls, &out, snapshot, event_mode).await;
    assert_same(
        &as_known,
        &as_known_after,
        "as-known is unchanged by data that arrived later",
    );
    assert_ne!(
        format!("{event_time:?}"),
        format!("{event_time_after:?}"),
        "event-time sees the late events"
    );
    // And both still equal the naive path.
    for (d, mode, tiled) in [
        (snapshot, event_mode, &event_time_after),
        (snapshot, as_known_mode, &as_known_after),
    ] {
        let naive = run(&ctx, &snapshot_query(&pipeline, d, mode).sql).await;
        assert_same(&naive, tiled, &format!("naive {d} {mode:?}"));
    }
    // The week holding the late day is rolled up again (its partition changed) and the
    // later snapshot sees the late events, in both modes (they arrived before its cutoff).
    let (stats, rolled, later_after) =
        daily(&ctx, &pipeline, &reports, &ls, &out, later, event_mode).await;
    assert!(rolled);
    assert_eq!(stats["plays"].rollups_built, 1, "{stats:?}");
    assert_ne!(format!("{later_before:?}"), format!("{later_after:?}"));
    for mode in [event_mode, as_known_mode] {
        let (_, rolled, tiled) = daily(&ctx, &pipeline, &reports, &ls, &out, later, mode).await;
        assert!(rolled, "{mode:?}");
        let naive = run(&ctx, &snapshot_query(&pipeline, later, mode).sql).await;
        assert_same(&naive, &tiled, &format!("naive {later} {mode:?}"));
    }
}

/// Every day tile and distinct-value tile under `tiles` holds its rows in key order: a
/// backfill cut into ranges of keys relies on it to skip the row groups of other ranges.
/// With `rollups`, the roll-ups too (so the same tiles always give the same roll-up
/// files), and there must be some.
fn assert_tiles_sorted_by_key(tiles: &Path, rollups: bool) {
    use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
    let mut files = Vec::new();
    let mut dirs = vec![tiles.to_path_buf()];
    while let Some(d) = dirs.pop() {
        for e in std::fs::read_dir(&d).unwrap() {
            let p = e.unwrap().path();
            if p.is_dir() {
                dirs.push(p);
            } else if p.extension().is_some_and(|x| x == "parquet")
                && (rollups || !p.to_string_lossy().contains("-r"))
            {
                files.push(p);
            }
        }
    }
    assert!(files.len() > 20, "{} tile files", files.len());
    if rollups {
        let rolled = files
            .iter()
            .filter(|f| f.to_string_lossy().contains("-r"))
            .count();
        assert!(rolled > 0, "no roll-up files");
    }
    let mut checked_rows = 0;
    for f in files {
        let reader = ParquetRecordBatchReaderBuilder::try_new(std::fs::File::open(&f).unwrap())
            .unwrap()
            .build()
            .unwrap();
        let mut previous: Option<String> = None;
        for batch in reader {
            let batch = batch.unwrap();
            let keys = batch.column(batch.schema().index_of("__key").unwrap());
            for i in 0..keys.len() {
                let key = (!keys.is_null(i)).then(|| array_value_to_string(keys, i).unwrap());
                if let (Some(p), Some(k)) = (&previous, &key) {
                    assert!(p <= k, "{}: key {k} after {p}", f.display());
                }
                previous = key.or(previous);
                checked_rows += 1;
            }
        }
    }
    assert!(checked_rows > 1000, "{checked_rows} tile rows");
}

/// Copies a plays file with new event ids and arrival times on 2026-05-16 (UTC).
fn rewrite_as_late(src: &Path, dst: &Path) {
    use arrow::array::{StringArray, TimestampMicrosecondArray};
    use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
    let reader = ParquetRecordBatchReaderBuilder::try_new(std::fs::File::open(src).unwrap())
        .unwrap()
        .build()
        .unwrap();
    let batches: Vec<RecordBatch> = reader.map(|b| b.unwrap()).collect();
    let schema = batches[0].schema();
    let mut w = parquet::arrow::ArrowWriter::try_new(
        std::fs::File::create(dst).unwrap(),
        schema.clone(),
        None,
    )
    .unwrap();
    let arrival = NaiveDate::from_ymd_opt(2026, 5, 16)
        .unwrap()
        .and_hms_opt(12, 0, 0)
        .unwrap()
        .and_utc()
        .timestamp_micros();
    for b in batches {
        let ids: StringArray = b
            .column(0)
            .as_string::<i32>()
            .iter()
            .map(|s| s.map(|s| format!("late-{s}")))
            .collect();
        let arrived =
            TimestampMicrosecondArray::from(vec![arrival; b.num_rows()]).with_timezone("UTC");
        let mut cols = b.columns().to_vec();
        cols[0] = std::sync::Arc::new(ids);
        cols[3] = std::sync::Arc::new(arrived);
        w.write(&RecordBatch::try_new(schema.clone(), cols).unwrap())
            .unwrap();
    }
    w.close().unwrap();
}

/// De-duplication on two columns (`dedupe_on: [event_id, customer_id]`, the same copies as
/// on `event_id` alone): the tiled range query still equals the naive path on every day,
/// in both modes. (The tile query once joined its per-column comparisons without
/// parentheses, which DataFusion could not plan with more than one column.)
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn two_dedupe_columns_give_the_naive_rows() {
    let dir = tempfile::tempdir().unwrap();
    let world = dir.path().join("world");
    let mut cfg = WorldConfig::new(&world, 60, 45);
    cfg.start = day("2026-02-01");
    cfg.seed = 11;
    generate(&cfg).unwrap();
    let mut pipeline = demo_pipeline(&world, &dir.path().join("out"));
    let plays = pipeline.sources.get_mut("plays").unwrap();
    assert_eq!(plays.spec.dedupe_on, vec!["event_id".to_string()]);
    plays.spec.dedupe_on.push("customer_id".to_string());
    let reports = inspect_sources(&pipeline).await;
    let out = daymark_store::resolve(&dir.path().join("out").display().to_string(), None).unwrap();
    let ctx = daymark_engine::session::session(&Default::default()).unwrap();
    register_sources(&ctx, &pipeline, &reports).await.unwrap();
    let ls = layouts(&pipeline);
    let (first, last) = (day("2026-03-01"), day("2026-03-14"));
    let days: Vec<NaiveDate> = first.iter_days().take_while(|d| *d <= last).collect();
    prepare(&ctx, &pipeline, &reports, &ls, &out, &days, None)
        .await
        .unwrap();
    let types = tile_types(&ctx, &ls).await;
    for mode in [None, Some(Knowledge::EventTime)] {
        let sql = range_query(&pipeline, &ls, first, last, mode, &types, &KeyRange::all());
        let range = run(&ctx, &sql).await;
        for d in &days {
            let naive = run(&ctx, &snapshot_query(&pipeline, *d, mode).sql).await;
            assert!(naive.num_rows() > 0);
            assert_same(&naive, &rows_of_day(&range, *d), &format!("{d} {mode:?}"));
        }
    }
}

/// Features without a window start (days since, last value and counts over `all`, the
/// population's state) read the history up to a month's end as one roll-up. It is built
/// from the day tiles the first time (from the months under a memory limit), then
/// extended by one month from the previous one; a late file in an old partition makes it
/// stale (rebuilt for event-time snapshots, not used by as-known ones that could not have
/// seen the file). Every snapshot equals the naive path in both modes.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn history_rollups_extend_month_by_month_and_follow_late_files() {
    use daymark_engine::rollups::Span;
    use daymark_spec::FeatureDef;
    let dir = tempfile::tempdir().unwrap();
    let world = dir.path().join("world");
    let mut cfg = WorldConfig::new(&world, 150, 100);
    cfg.start = day("2026-01-01");
    cfg.seed = 11;
    generate(&cfg).unwrap();
    let mut pipeline = demo_pipeline(&world, &dir.path().join("out"));
    // The demo's features without a window start: plays' days since the last play, the
    // subscription state (plan, fee, tenure, spells, counts over all history).
    pipeline.features.retain(|f| match &f.def {
        FeatureDef::Aggregate { agg, window, .. } => agg.is_unbounded() || window.days().is_none(),
        _ => false,
    });
    assert!(pipeline.features.len() >= 7, "{}", pipeline.features.len());
    let out = daymark_store::resolve(&dir.path().join("out").display().to_string(), None).unwrap();
    let ls = layouts(&pipeline);
    let (as_known, event_time) = (None, Some(Knowledge::EventTime));
    let history_of = |plan: &daymark_engine::rollups::DayPlan, source: &str| -> Vec<Span> {
        plan.sources[source]
            .spans
            .iter()
            .filter(|s| s.level == Level::History)
            .copied()
            .collect()
    };
    let history = |first: &str| Span {
        level: Level::History,
        first: day(first),
    };
    let reports = inspect_sources(&pipeline).await;
    let ctx = daymark_engine::session::session(&Default::default()).unwrap();
    register_sources(&ctx, &pipeline, &reports).await.unwrap();
    // 2026-03-10: February ended on or before the day before yesterday, and its rows had
    // all arrived (the world's late rows come up to 5 days late).
    let (stats, plan) = checked_day(
        &ctx,
        &pipeline,
        &reports,
        &ls,
        &out,
        day("2026-03-10"),
        as_known,
    )
    .await;
    for source in ["plays", "subscriptions"] {
        assert_eq!(
            history_of(&plan, source),
            [history("2026-02-01")],
            "{source}"
        );
        // No month before March is read on its own.
        let months: Vec<_> = plan.sources[source]
            .spans
            .iter()
            .filter(|s| s.level == Level::Month)
            .collect();
        assert!(months.is_empty(), "{source}: {months:?}");
        assert!(
            stats[source].rollups_built >= 2,
            "{source}: {:?}",
            stats[source]
        );
    }
    checked_day(
        &ctx,
        &pipeline,
        &reports,
        &ls,
        &out,
        day("2026-03-10"),
        event_time,
    )
    .await;
    // Under a memory limit, a first history comes from the months (December to February,
    // rolled up one per query), not from one grouping of every tile row.
    let limited = daymark_engine::session::session(&daymark_engine::session::EngineOptions {
        memory_limit: Some(512 << 20),
        ..Default::default()
    })
    .unwrap();
    register_sources(&limited, &pipeline, &reports)
        .await
        .unwrap();
    let out_limited =
        daymark_store::resolve(&dir.path().join("out-limited").display().to_string(), None)
            .unwrap();
    let (stats, plan) = checked_day(
        &limited,
        &pipeline,
        &reports,
        &ls,
        &out_limited,
        day("2026-03-10"),
        as_known,
    )
    .await;
    assert_eq!(history_of(&plan, "plays"), [history("2026-02-01")]);
    assert!(stats["plays"].rollups_built >= 4, "{stats:?}");
    // 2026-04-09: March is added to February's history; the day after reuses it.
    let (stats, plan) = checked_day(
        &ctx,
        &pipeline,
        &reports,
        &ls,
        &out,
        day("2026-04-09"),
        as_known,
    )
    .await;
    assert_eq!(history_of(&plan, "plays"), [history("2026-03-01")]);
    assert_eq!(
        stats["plays"].rollups_built, 2,
        "March and its history: {stats:?}"
    );
    let (stats, _) = checked_day(
        &ctx,
        &pipeline,
        &reports,
        &ls,
        &out,
        day("2026-04-10"),
        event_time,
    )
    .await;
    assert_eq!(stats["plays"].rollups_built, 0, "{stats:?}");
    assert_eq!(stats["subscriptions"].rollups_built, 0, "{stats:?}");

    // A late file of 2026-01-20 that arrived on 2026-05-16, after every snapshot here.
    let part = world.join("plays/dt=2026-01-20");
    let src = std::fs::read_dir(&part)
        .unwrap()
        .map(|e| e.unwrap().path())
        .find(|p| p.to_string_lossy().contains("arrived-2026-01-20"))
        .unwrap();
    rewrite_as_late(&src, &part.join("arrived-2026-05-16-9.parquet"));
    let reports = inspect_sources(&pipeline).await;
    let ctx = daymark_engine::session::session(&Default::default()).unwrap();
    register_sources(&ctx, &pipeline, &reports).await.unwrap();
    // Event time sees the late events through a rebuilt history; as-known cannot use a
    // history holding rows that arrived after its cutoff, and reads months, weeks and days.
    let (stats, plan) = checked_day(
        &ctx,
        &pipeline,
        &reports,
        &ls,
        &out,
        day("2026-04-09"),
        event_time,
    )
    .await;
    assert_eq!(history_of(&plan, "plays"), [history("2026-03-01")]);
    // Every earlier history holds the changed partition: this one comes from the tiles.
    assert_eq!(stats["plays"].rollups_built, 1, "{stats:?}");
    let (_, plan) = checked_day(
        &ctx,
        &pipeline,
        &reports,
        &ls,
        &out,
        day("2026-04-09"),
        as_known,
    )
    .await;
    assert!(history_of(&plan, "plays").is_empty(), "{plan:?}");
    assert_eq!(history_of(&plan, "subscriptions"), [history("2026-03-01")]);
}

/// Plans and runs the daily build of `d` and checks it against the naive path; returns the
/// plan and its stats.
async fn checked_day(
    ctx: &datafusion::prelude::SessionContext,
    pipeline: &daymark_spec::Pipeline,
    reports: &std::collections::BTreeMap<String, daymark_engine::sources::SourceReport>,
    ls: &std::collections::BTreeMap<String, daymark_engine::tiles::TileLayout>,
    out: &daymark_store::Location,
    d: NaiveDate,
    mode: Option<Knowledge>,
) -> (
    std::collections::BTreeMap<String, daymark_engine::tiles::TileStats>,
    daymark_engine::rollups::DayPlan,
) {
    let (stats, plan) = plan_day(ctx, pipeline, reports, ls, out, d, mode)
        .await
        .unwrap();
    let tiled = run(ctx, &tiled_snapshot_query(pipeline, ls, &plan, mode).sql).await;
    let naive = run(ctx, &snapshot_query(pipeline, d, mode).sql).await;
    assert!(naive.num_rows() > 50, "{d}: {} rows", naive.num_rows());
    assert_same(&naive, &tiled, &format!("{d} {mode:?}"));
    (stats, plan)
}
