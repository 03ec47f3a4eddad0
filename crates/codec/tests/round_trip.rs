//! Every plan of a backfill, a daily build and a naive snapshot survives DataFusion's
//! protobuf serialisation with daymark's codec, decoded where only built-in functions are
//! known, and gives the same snapshots as the plans run in place: what a cluster needs to
//! run daymark's plans unchanged.

use arrow::array::{Array, AsArray, RecordBatch};
use arrow::compute::concat_batches;
use arrow::datatypes::{DataType, Float64Type};
use arrow::util::display::array_value_to_string;
use chrono::NaiveDate;
use daymark_codec::RoundTripPlanner;
use daymark_engine::backfill::{build_range, direct_features, tile_types};
use daymark_engine::rollups::plan_day;
use daymark_engine::session::{session, EngineOptions};
use daymark_engine::tiles::{layouts, prepare, tiled_snapshot_query};
use daymark_engine::{inspect_sources, register_sources, snapshot_query};
use daymark_spec::{Knowledge, Pipeline};
use daymark_worldgen::{generate, WorldConfig};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::Arc;

fn day(s: &str) -> NaiveDate {
    s.parse().unwrap()
}

fn days(first: &str, last: &str) -> Vec<NaiveDate> {
    let last = day(last);
    day(first).iter_days().take_while(|d| *d <= last).collect()
}

/// The demo pipeline over the world in `world`, writing to `out`, with `features` (YAML
/// list items) added after its own.
fn demo_pipeline(world: &Path, out: &Path, features: &str) -> Pipeline {
    // Read when the test runs: a test binary reused from a shared target folder keeps the
    // compile-time path of the checkout that built it.
    let root =
        std::env::var("CARGO_MANIFEST_DIR").unwrap_or_else(|_| env!("CARGO_MANIFEST_DIR").into());
    let text = std::fs::read_to_string(PathBuf::from(root).join("../../pipelines/demo.yaml"))
        .unwrap()
        .replace("\nlabel:", &format!("{features}\nlabel:"))
        .replace("../demo-data/world/", &format!("{}/", world.display()))
        .replace(
            "output: ../demo-data/out",
            &format!("output: {}", out.display()),
        );
    daymark_spec::load_str(&text, None).unwrap()
}

/// A greatest text value, which the windowed totals do not take: with it the demo
/// pipeline's backfill takes the general query (daymark's running functions).
const TEXT_MAXIMUM: &str = "
  - name: last_genre_name_28d
    source: plays
    agg: max
    expr: genre
    window: 28d
    fill: null";

/// Every Parquet file under `dir` whose path has a `snapshots` folder, by relative path.
fn snapshot_files(dir: &Path, base: &Path, found: &mut BTreeMap<String, RecordBatch>) {
    for e in std::fs::read_dir(dir).unwrap().flatten() {
        let p = e.path();
        if p.is_dir() {
            snapshot_files(&p, base, found);
        } else if p.extension().is_some_and(|x| x == "parquet") {
            let rel = p.strip_prefix(base).unwrap().display().to_string();
            if !rel.starts_with("snapshots") && !rel.contains("/snapshots") {
                continue;
            }
            let file = std::fs::File::open(&p).unwrap();
            let reader =
                parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder::try_new(file)
                    .unwrap()
                    .build()
                    .unwrap();
            let batches: Vec<RecordBatch> = reader.map(Result::unwrap).collect();
            let schema = batches
                .first()
                .map(|b| b.schema())
                .unwrap_or_else(|| Arc::new(arrow::datatypes::Schema::empty()));
            found.insert(rel, concat_batches(&schema, &batches).unwrap());
        }
    }
}

/// Equal cell by cell; floats to 1e-9 relative (parallel sums may add in another order).
fn assert_same(a: &RecordBatch, b: &RecordBatch, what: &str) {
    assert_eq!(a.num_rows(), b.num_rows(), "{what}: row counts");
    assert_eq!(a.schema(), b.schema(), "{what}: schemas");
    for (i, field) in a.schema().fields().iter().enumerate() {
        let (x, y) = (a.column(i), b.column(i));
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
                array_value_to_string(x, r).unwrap() == array_value_to_string(y, r).unwrap()
            };
            assert!(
                same,
                "{what}: row {r}, column {}: {} against {}",
                field.name(),
                array_value_to_string(x, r).unwrap(),
                array_value_to_string(y, r).unwrap()
            );
        }
    }
}

/// Builds, in a session with `planner` (or DataFusion's own), in `out`:
/// - the demo pipeline's snapshots, with a greatest text value, of 2026-03-02..31 from one
///   set-based query (the general query: daymark's running functions), then
///   2026-04-01..03 one day at a time from tiles and roll-ups (a daily build's query), all
///   in each source's own mode;
/// - the demo pipeline's snapshots of 2026-03-02..31, event time (every feature through
///   the windowed-totals aggregate), in `out/totals`;
///
/// and returns every snapshot file's rows, with the naive snapshot of 2026-04-03 (as
/// known) under `naive`.
async fn build_everything(
    world: &Path,
    out: &Path,
    planner: Option<Arc<RoundTripPlanner>>,
) -> BTreeMap<String, RecordBatch> {
    let opts = EngineOptions {
        query_planner: planner.map(|p| p as _),
        ..Default::default()
    };
    let ctx = session(&opts).unwrap();
    let pipeline = demo_pipeline(world, out, TEXT_MAXIMUM);
    let reports = inspect_sources(&pipeline).await;
    register_sources(&ctx, &pipeline, &reports).await.unwrap();
    let store = daymark_store::resolve(&out.display().to_string(), None).unwrap();
    let ls = layouts(&pipeline);
    let (range, daily) = (
        days("2026-03-02", "2026-03-31"),
        days("2026-04-01", "2026-04-03"),
    );
    let all: Vec<NaiveDate> = range.iter().chain(&daily).copied().collect();
    prepare(&ctx, &pipeline, &reports, &ls, &store, &all, None)
        .await
        .unwrap();
    assert!(!direct_features(&pipeline, &tile_types(&ctx, &ls).await));
    let built = build_range(&ctx, &pipeline, &ls, &store, &range, None, None, |_| {})
        .await
        .unwrap();
    assert_eq!(built.len(), range.len());
    for &d in &daily {
        let (_, plan) = plan_day(&ctx, &pipeline, &reports, &ls, &store, d, None)
            .await
            .unwrap();
        let query = tiled_snapshot_query(&pipeline, &ls, &plan, None);
        daymark_engine::build::build_day_checked(
            &ctx,
            &pipeline,
            &store,
            d,
            None,
            &query.sql,
            Some((&ls, &plan)),
            None,
        )
        .await
        .unwrap();
    }
    let naive = snapshot_query(&pipeline, day("2026-04-03"), Some(Knowledge::AsKnown)).sql;
    let batches = ctx.sql(&naive).await.unwrap().collect().await.unwrap();
    let naive = concat_batches(&batches[0].schema(), &batches).unwrap();

    let totals_out = out.join("totals");
    let totals = demo_pipeline(world, &totals_out, "");
    let totals_store = daymark_store::resolve(&totals_out.display().to_string(), None).unwrap();
    let tls = layouts(&totals);
    let mode = Some(Knowledge::EventTime);
    prepare(&ctx, &totals, &reports, &tls, &totals_store, &range, mode)
        .await
        .unwrap();
    assert!(direct_features(&totals, &tile_types(&ctx, &tls).await));
    build_range(
        &ctx,
        &totals,
        &tls,
        &totals_store,
        &range,
        mode,
        None,
        |_| {},
    )
    .await
    .unwrap();

    let mut found = BTreeMap::new();
    snapshot_files(out, out, &mut found);
    found.insert("naive".into(), naive);
    found
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn plans_sent_through_protobuf_give_the_same_snapshots() {
    let dir = tempfile::tempdir().unwrap();
    let world = dir.path().join("world");
    let mut cfg = WorldConfig::new(&world, 80, 100);
    cfg.start = day("2026-01-01");
    cfg.seed = 11;
    generate(&cfg).unwrap();

    let in_place = build_everything(&world, &dir.path().join("in-place"), None).await;
    let planner = Arc::new(RoundTripPlanner::default());
    let shipped =
        build_everything(&world, &dir.path().join("shipped"), Some(planner.clone())).await;

    // 30 + 3 days of the demo pipeline, 30 of the totals-only one, the naive snapshot.
    assert_eq!(in_place.len(), 64, "{:?}", in_place.keys());
    assert_eq!(
        in_place.keys().collect::<Vec<_>>(),
        shipped.keys().collect::<Vec<_>>()
    );
    let mut rows = 0;
    for (name, a) in &in_place {
        assert_same(a, &shipped[name], name);
        rows += a.num_rows();
    }
    assert!(rows > 30 * 40, "{rows} rows");

    // Every plan went through protobuf, and daymark's functions arrived by the codec (the
    // decoding side knows only DataFusion's built-in functions).
    let decoded = planner.decoded();
    println!(
        "{} plans, {} bytes of protobuf; decoded {decoded:?}",
        planner.plans(),
        planner.bytes()
    );
    assert!(planner.plans() >= 40, "{}", planner.plans());
    for f in [
        daymark_engine::functions::FIRST_COPY,
        daymark_engine::functions::RUNNING_SUM,
        daymark_engine::window_totals::WINDOW_TOTALS,
    ] {
        assert!(decoded.get(f).is_some_and(|n| *n > 0), "{f}: {decoded:?}");
    }
}
