//! The drift computation (reference deciles as DataFusion's `percentile_cont` gives them, bin counts) on a
//! table small enough to work by hand.

use datafusion::arrow::array::{Float64Array, RecordBatch, StringArray};
use datafusion::arrow::datatypes::{DataType, Field, Schema};
use datafusion::datasource::MemTable;
use datafusion::prelude::SessionContext;
use std::sync::Arc;

#[tokio::test]
async fn psi_of_a_table_worked_by_hand() {
    // Reference (dt = 'r'): 1, 2, ..., 10. Current (dt = 'c'): five 1s and five 10s.
    let mut dt = vec!["r"; 10];
    dt.extend(vec!["c"; 10]);
    let mut v: Vec<Option<f64>> = (1..=10).map(|x| Some(x as f64)).collect();
    v.extend([1.0, 1.0, 1.0, 1.0, 1.0, 10.0, 10.0, 10.0, 10.0, 10.0].map(Some));
    let schema = Arc::new(Schema::new(vec![
        Field::new("dt", DataType::Utf8, false),
        Field::new("x", DataType::Float64, true),
    ]));
    let batch = RecordBatch::try_new(
        schema.clone(),
        vec![
            Arc::new(StringArray::from(dt)),
            Arc::new(Float64Array::from(v)),
        ],
    )
    .unwrap();
    let ctx = SessionContext::new();
    ctx.register_table(
        "t",
        Arc::new(MemTable::try_new(schema, vec![vec![batch]]).unwrap()),
    )
    .unwrap();
    let got = daymark_audit::quality::psi_between(
        &ctx,
        "t",
        "dt = 'r'",
        "t",
        "dt = 'c'",
        &["x".to_string()],
    )
    .await
    .unwrap();
    // Worked by hand: deciles of 1..10 with linear interpolation sit at positions
    // q * (n - 1) = 0.9, 1.8, ..., 8.1, i.e. edges 1.9, 2.8, 3.7, 4.6, 5.5, 6.4, 7.3, 8.2, 9.1,
    // so each of the 10 value bins holds one reference value (share 0.1) and no nulls.
    // The current values fill the first and last bin (share 0.5 each), the other 8 are
    // empty (share 0.0001):
    //   2 * (0.5 - 0.1) * ln(0.5 / 0.1)          = 2 * 0.4 * 1.609438      = 1.287550
    //   8 * (0.0001 - 0.1) * ln(0.0001 / 0.1)    = 8 * -0.0999 * -6.907755 = 5.520679
    //   PSI                                                                 = 6.808229
    let psi = got["x"];
    assert!((psi - 6.808229).abs() < 1e-5, "{psi}");

    // Identical distributions give 0.
    let same =
        daymark_audit::quality::psi_between(&ctx, "t", "dt = 'r'", "t", "dt = 'r'", &["x".into()])
            .await
            .unwrap();
    assert!(same["x"].abs() < 1e-12);
}
