//! Hand-worked label cases: every branch of the label definition, maturity exact to the
//! day, idempotence, and a daylight-saving change. Inputs are small Parquet files written
//! here; every expected value below was worked out by hand from the definition in the
//! README ("Semantics": labels).

use arrow::array::{Array, AsArray, RecordBatch, StringArray, TimestampMicrosecondArray};
use arrow::datatypes::{
    DataType, Date32Type, Field, Int32Type, Schema, TimeUnit, TimestampMicrosecondType,
};
use chrono::{DateTime, NaiveDate, Utc};
use daymark_labels::{backfill, source_watermarks};
use parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder;
use parquet::arrow::ArrowWriter;
use std::collections::BTreeMap;
use std::path::Path;
use std::sync::Arc;

fn ts(s: &str) -> i64 {
    DateTime::parse_from_rfc3339(s).unwrap().timestamp_micros()
}

fn d(s: &str) -> NaiveDate {
    s.parse().unwrap()
}

/// Writes change-log rows (key, changed_at, kind) into UTC day partitions.
fn write_log(dir: &Path, rows: &[(&str, &str, &str)]) {
    let mut by_day: BTreeMap<String, Vec<(&str, i64, &str)>> = BTreeMap::new();
    for (k, t, kind) in rows {
        let micros = ts(t);
        let day = DateTime::from_timestamp_micros(micros)
            .unwrap()
            .date_naive();
        by_day
            .entry(day.to_string())
            .or_default()
            .push((k, micros, kind));
    }
    let schema = Arc::new(Schema::new(vec![
        Field::new("customer_id", DataType::Utf8, true),
        Field::new(
            "changed_at",
            DataType::Timestamp(TimeUnit::Microsecond, Some("UTC".into())),
            true,
        ),
        Field::new("kind", DataType::Utf8, true),
        Field::new("status", DataType::Utf8, true),
    ]));
    for (day, rows) in by_day {
        let part = dir.join(format!("dt={day}"));
        std::fs::create_dir_all(&part).unwrap();
        let batch = RecordBatch::try_new(
            schema.clone(),
            vec![
                Arc::new(StringArray::from_iter_values(rows.iter().map(|r| r.0))),
                Arc::new(
                    TimestampMicrosecondArray::from_iter_values(rows.iter().map(|r| r.1))
                        .with_timezone("UTC"),
                ),
                Arc::new(StringArray::from_iter_values(rows.iter().map(|r| r.2))),
                Arc::new(StringArray::from_iter_values(rows.iter().map(|_| "active"))),
            ],
        )
        .unwrap();
        let f = std::fs::File::create(part.join("a.parquet")).unwrap();
        let mut w = ArrowWriter::try_new(f, schema.clone(), None).unwrap();
        w.write(&batch).unwrap();
        w.close().unwrap();
    }
}

/// Marks day partitions `first..=last` complete.
fn mark(dir: &Path, first: &str, last: &str) {
    for day in d(first).iter_days().take_while(|x| *x <= d(last)) {
        let part = dir.join(format!("dt={day}"));
        std::fs::create_dir_all(&part).unwrap();
        std::fs::write(part.join("_complete"), b"").unwrap();
    }
}

/// Writes a snapshot file (key, snapshot_date) for `day` with `keys`.
fn write_snapshot(out: &Path, day: &str, keys: &[&str]) {
    let part = out.join("snapshots").join(format!("dt={day}"));
    std::fs::create_dir_all(&part).unwrap();
    let schema = Arc::new(Schema::new(vec![
        Field::new("customer_id", DataType::Utf8, true),
        Field::new("snapshot_date", DataType::Date32, true),
    ]));
    let days = (d(day) - d("1970-01-01")).num_days() as i32;
    let batch = RecordBatch::try_new(
        schema.clone(),
        vec![
            Arc::new(StringArray::from_iter_values(keys.iter().copied())),
            Arc::new(arrow::array::Date32Array::from(vec![days; keys.len()])),
        ],
    )
    .unwrap();
    let f = std::fs::File::create(part.join("part-0.parquet")).unwrap();
    let mut w = ArrowWriter::try_new(f, schema, None).unwrap();
    w.write(&batch).unwrap();
    w.close().unwrap();
}

fn pipeline(root: &Path, tz: &str, horizon: u32, grace: u32) -> daymark_spec::Pipeline {
    let text = format!(
        r#"
daymark: 1
name: cases
timezone: {tz}
key: customer_id
output: out
sources:
  subs:
    location: subs
    event_time: changed_at
population:
  state: {{ source: subs, column: status, values: [active] }}
features:
  - name: changes
    source: subs
    agg: count
    window: 7d
label:
  name: churned
  source: subs
  horizon: {horizon}d
  grace: {grace}d
  ended: kind = 'ended'
  resumed: kind IN ('resumed', 'started')
"#
    );
    daymark_spec::load_str(&text, Some(root)).unwrap()
}

#[derive(Debug, PartialEq)]
struct Row {
    key: String,
    day: NaiveDate,
    label: bool,
    days_to_event: Option<i32>,
    censored: bool,
    matured_at: i64,
}

fn read_labels(file: &Path) -> (Vec<Row>, Arc<Schema>) {
    let f = std::fs::File::open(file).unwrap();
    let reader = ParquetRecordBatchReaderBuilder::try_new(f)
        .unwrap()
        .build()
        .unwrap();
    let mut rows = Vec::new();
    let mut schema = None;
    for b in reader {
        let b = b.unwrap();
        schema = Some(b.schema());
        let k = b.column(0).as_string::<i32>();
        let sd = b.column(1).as_primitive::<Date32Type>();
        let l = b.column(2).as_boolean();
        let dte = b.column(3).as_primitive::<Int32Type>();
        let c = b.column(4).as_boolean();
        let m = b.column(5).as_primitive::<TimestampMicrosecondType>();
        for i in 0..b.num_rows() {
            rows.push(Row {
                key: k.value(i).to_string(),
                day: d("1970-01-01") + chrono::Duration::days(sd.value(i) as i64),
                label: l.value(i),
                days_to_event: (!dte.is_null(i)).then(|| dte.value(i)),
                censored: c.value(i),
                matured_at: m.value(i),
            });
        }
    }
    (rows, schema.unwrap())
}

async fn run(
    p: &daymark_spec::Pipeline,
    out: &Path,
    until: Option<NaiveDate>,
) -> daymark_labels::Backfill {
    let reports = daymark_engine::inspect_sources(p).await;
    for r in reports.values() {
        assert!(r.problems.is_empty(), "{:?}", r.problems);
    }
    let ctx = daymark_engine::session::session(&Default::default()).unwrap();
    daymark_engine::register_sources(&ctx, p, &reports)
        .await
        .unwrap();
    let wm = source_watermarks(p, &reports);
    let loc = daymark_store::resolve(out.to_str().unwrap(), None).unwrap();
    backfill(&ctx, p, &wm, &loc, None, until).await.unwrap()
}

fn expect(rows: &[Row], key: &str, label: bool, dte: Option<i32>, censored: bool) {
    let r = rows
        .iter()
        .find(|r| r.key == key)
        .unwrap_or_else(|| panic!("no row for {key}"));
    assert_eq!(
        (r.label, r.days_to_event, r.censored),
        (label, dte, censored),
        "key {key}"
    );
}

#[tokio::test]
async fn every_branch_maturity_and_idempotence_in_utc() {
    let tmp = tempfile::tempdir().unwrap();
    let root = tmp.path();
    // Snapshot 2026-03-01, UTC: cutoff 03-01 00:00Z, window (03-01 00:00, 03-11 00:00],
    // grace 3 days, matured at 03-14 00:00Z.
    write_log(
        &root.join("subs"),
        &[
            ("b", "2026-02-20T10:00:00Z", "ended"), // ended before the cutoff
            ("c", "2026-03-05T12:00:00Z", "ended"), // ended within the horizon
            ("d", "2026-03-05T12:00:00Z", "ended"), // ... resumed within the grace
            ("d", "2026-03-07T12:00:00Z", "resumed"),
            ("e", "2026-03-05T12:00:00Z", "ended"), // ... resumed 1 µs after the grace
            ("e", "2026-03-08T12:00:00.000001Z", "resumed"),
            ("e2", "2026-03-05T12:00:00Z", "ended"), // ... resumed exactly at t + grace
            ("e2", "2026-03-08T12:00:00Z", "started"),
            ("f", "2026-03-03T00:00:01Z", "ended"), // ended twice: first one cancelled
            ("f", "2026-03-04T00:00:00Z", "resumed"),
            ("f", "2026-03-09T06:00:00Z", "ended"),
            ("f2", "2026-03-02T08:00:00Z", "ended"), // ended twice, both kept: first counts
            ("f2", "2026-03-06T08:00:00Z", "ended"),
            ("g", "2026-03-01T00:00:00Z", "ended"), // ended exactly at the cutoff
            ("h", "2026-03-11T00:00:00Z", "ended"), // ended exactly at the horizon end
            ("i", "2026-03-11T00:00:00.000001Z", "ended"), // 1 µs after it
            ("j", "2026-02-20T10:00:00Z", "ended"), // ended and resumed before the cutoff
            ("j", "2026-02-25T10:00:00Z", "resumed"),
            ("k", "2026-03-01T00:00:00.000001Z", "ended"), // 1 µs after the cutoff
            ("l", "2026-03-10T12:00:00Z", "ended"),        // grace reaches past the horizon
            ("l", "2026-03-13T11:00:00Z", "resumed"),
            ("z", "2026-03-20T00:00:00Z", "renewed"), // data after everything
        ],
    );
    // Complete through dt=2026-03-14: the watermark is 2026-03-15 00:00Z.
    mark(&root.join("subs"), "2026-02-20", "2026-03-14");
    let keys = [
        "a", "b", "c", "d", "e", "e2", "f", "f2", "g", "h", "i", "j", "k", "l",
    ];
    let out = root.join("out");
    for day in ["2026-03-01", "2026-03-02", "2026-03-03", "2026-03-04"] {
        write_snapshot(&out, day, &keys);
    }
    let p = pipeline(root, "UTC", 10, 3);
    let first = run(&p, &out, None).await;
    assert_eq!(
        first.watermark.unwrap().to_rfc3339(),
        "2026-03-15T00:00:00+00:00"
    );
    // D + 10 + 3 <= 03-15 only for D <= 03-02 (03-02 matures exactly at the watermark).
    let labeled: Vec<NaiveDate> = first.labeled.iter().map(|l| l.day).collect();
    assert_eq!(labeled, vec![d("2026-03-01"), d("2026-03-02")]);
    assert!(first.labeled.iter().all(|l| l.written));
    let pending: Vec<(NaiveDate, String)> = first
        .pending
        .iter()
        .map(|p| (p.day, p.matured_at.to_rfc3339()))
        .collect();
    assert_eq!(
        pending,
        vec![
            (d("2026-03-03"), "2026-03-16T00:00:00+00:00".to_string()),
            (d("2026-03-04"), "2026-03-17T00:00:00+00:00".to_string()),
        ]
    );
    // Never early: no file for a day that has not matured.
    assert!(!out.join("labels/dt=2026-03-03").exists());
    assert!(!out.join("labels/dt=2026-03-04").exists());

    let file = out.join("labels/dt=2026-03-01/part-0.parquet");
    let (rows, schema) = read_labels(&file);
    let names: Vec<&str> = schema.fields().iter().map(|f| f.name().as_str()).collect();
    assert_eq!(
        names,
        [
            "customer_id",
            "snapshot_date",
            "churned",
            "days_to_event",
            "censored",
            "matured_at"
        ]
    );
    assert_eq!(schema.field(2).data_type(), &DataType::Boolean);
    assert_eq!(schema.field(3).data_type(), &DataType::Int32);
    assert_eq!(
        schema.field(5).data_type(),
        &DataType::Timestamp(TimeUnit::Microsecond, Some("UTC".into()))
    );
    assert_eq!(rows.len(), keys.len());
    let sorted: Vec<&str> = rows.iter().map(|r| r.key.as_str()).collect();
    assert_eq!(sorted, keys);
    assert!(rows.iter().all(|r| r.day == d("2026-03-01")));
    assert!(rows
        .iter()
        .all(|r| r.matured_at == ts("2026-03-14T00:00:00Z")));
    expect(&rows, "a", false, None, false);
    expect(&rows, "b", false, None, true);
    expect(&rows, "c", true, Some(5), false);
    expect(&rows, "d", false, None, false);
    expect(&rows, "e", true, Some(5), false);
    expect(&rows, "e2", false, None, false);
    expect(&rows, "f", true, Some(9), false);
    expect(&rows, "f2", true, Some(2), false);
    expect(&rows, "g", false, None, true);
    expect(&rows, "h", true, Some(10), false);
    expect(&rows, "i", false, None, false);
    expect(&rows, "j", false, None, false);
    expect(&rows, "k", true, Some(1), false);
    expect(&rows, "l", false, None, false);
    assert_eq!(first.labeled[0].positives, 6);
    assert_eq!(first.labeled[0].censored, 2);

    // Snapshot 03-02: cutoff 03-02 00:00Z. b and g ended before it (censored); c, e, f2's
    // second end and h, i are inside (03-02, 03-12]; k ended before the cutoff.
    let (rows2, _) = read_labels(&out.join("labels/dt=2026-03-02/part-0.parquet"));
    expect(&rows2, "c", true, Some(4), false);
    expect(&rows2, "f2", true, Some(1), false);
    expect(&rows2, "h", true, Some(9), false);
    expect(&rows2, "i", true, Some(10), false);
    expect(&rows2, "k", false, None, true);
    expect(&rows2, "l", false, None, false);

    // A second run changes nothing: same bytes, same modification time, nothing written.
    let before = std::fs::read(&file).unwrap();
    let mtime = std::fs::metadata(&file).unwrap().modified().unwrap();
    let second = run(&p, &out, None).await;
    assert!(second.labeled.iter().all(|l| !l.written));
    assert_eq!(second.labeled.len(), 2);
    assert_eq!(std::fs::read(&file).unwrap(), before);
    assert_eq!(std::fs::metadata(&file).unwrap().modified().unwrap(), mtime);

    // --until stops at a day; one more complete day matures exactly one more snapshot.
    mark(&root.join("subs"), "2026-03-15", "2026-03-15");
    let third = run(&p, &out, Some(d("2026-03-03"))).await;
    let days: Vec<(NaiveDate, bool)> = third.labeled.iter().map(|l| (l.day, l.written)).collect();
    assert_eq!(
        days,
        vec![
            (d("2026-03-01"), false),
            (d("2026-03-02"), false),
            (d("2026-03-03"), true)
        ]
    );
    assert!(third.pending.is_empty());
    assert!(!out.join("labels/dt=2026-03-04").exists());
}

#[tokio::test]
async fn daylight_saving_change_in_the_pipeline_zone() {
    // America/Chicago moves from UTC-6 to UTC-5 at 2026-03-08 02:00 local (US rule:
    // second Sunday of March; common knowledge of the IANA rules). Snapshot 2026-03-02:
    // cutoff 03-02 00:00 CST = 06:00Z; horizon 7 days ends 03-09 00:00 CDT = 05:00Z (6 days
    // and 23 hours later); grace 1 day; matured 03-10 00:00 CDT = 03-10 05:00Z.
    let tmp = tempfile::tempdir().unwrap();
    let root = tmp.path();
    write_log(
        &root.join("subs"),
        &[
            // 00:30 CDT on 03-09: after the horizon end (a 7 x 24 h horizon would take it).
            ("m", "2026-03-09T05:30:00Z", "ended"),
            // 23:30 CDT on 03-08: the last day of the horizon.
            ("n", "2026-03-09T04:30:00Z", "ended"),
            // Ended 06:00 CST 03-07; the grace runs to 06:00 CDT 03-08 = 11:00Z. Resumed
            // 06:30 CDT: too late (24 h of grace would have reached 12:00Z and cancelled it).
            ("o", "2026-03-07T12:00:00Z", "ended"),
            ("o", "2026-03-08T11:30:00Z", "resumed"),
            // Resumed 05:30 CDT: within the grace.
            ("p", "2026-03-07T12:00:00Z", "ended"),
            ("p", "2026-03-08T10:30:00Z", "resumed"),
            // Ended 02:30 CST 03-07; one day later, 02:30 on 03-08, does not exist (the
            // clocks jump from 02:00 to 03:00). Resumed 03:10 CDT: its wall clock is past
            // 02:30, so not within the grace.
            ("r", "2026-03-07T08:30:00Z", "ended"),
            ("r", "2026-03-08T08:10:00Z", "resumed"),
            // Resumed 01:59 CST: within it.
            ("s", "2026-03-07T08:30:00Z", "ended"),
            ("s", "2026-03-08T07:59:00Z", "resumed"),
            // 00:00 CST on 03-02 is 06:00Z: exactly at the cutoff.
            ("q", "2026-03-02T06:00:00Z", "ended"),
        ],
    );
    let out = root.join("out");
    write_snapshot(&out, "2026-03-02", &["m", "n", "o", "p", "q", "r", "s"]);
    let p = pipeline(root, "America/Chicago", 7, 1);
    // Complete through dt=2026-03-09 (UTC): watermark 03-10 00:00Z, five hours short.
    mark(&root.join("subs"), "2026-03-01", "2026-03-09");
    let r = run(&p, &out, None).await;
    assert!(r.labeled.is_empty());
    assert_eq!(r.pending.len(), 1);
    assert_eq!(
        r.pending[0].matured_at.to_rfc3339(),
        "2026-03-10T05:00:00+00:00"
    );
    assert!(!out.join("labels").exists() || !out.join("labels/dt=2026-03-02").exists());
    mark(&root.join("subs"), "2026-03-10", "2026-03-10");
    let r = run(&p, &out, None).await;
    assert_eq!(r.labeled.len(), 1);
    let (rows, _) = read_labels(&out.join("labels/dt=2026-03-02/part-0.parquet"));
    expect(&rows, "m", false, None, false);
    expect(&rows, "n", true, Some(7), false);
    // 03-07 12:00Z lies in (cutoff of 03-07 = 06:00Z, cutoff of 03-08 = 06:00Z]: day 6.
    expect(&rows, "o", true, Some(6), false);
    expect(&rows, "p", false, None, false);
    expect(&rows, "q", false, None, true);
    expect(&rows, "r", true, Some(6), false);
    expect(&rows, "s", false, None, false);
    assert!(rows
        .iter()
        .all(|r| r.matured_at == ts("2026-03-10T05:00:00Z")));
    let _ = Utc::now();
}
