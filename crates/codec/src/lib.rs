//! Plans that travel.
//!
//! On a DataFusion cluster the client sends a query's logical plan to a scheduler, which
//! plans it and sends each stage's physical plan to executors, all as DataFusion's
//! protobuf (`datafusion-proto`). Built-in functions travel by name and every process
//! knows them. daymark's own functions ([`daymark_engine::functions`],
//! [`daymark_engine::window_totals`], [`daymark_engine::latest`]) travel with [`DaymarkCodec`]: each process that
//! decodes a plan (scheduler, executors) takes it as its extension codec, and then needs
//! nothing registered by hand.
//!
//! [`RoundTripPlanner`] is the check that this is enough. Set as a session's query
//! planner, it sends every plan the session runs through protobuf twice, as a cluster
//! would (the optimised logical plan, then the physical plan), decoding each time where
//! only DataFusion's built-in functions are registered, and runs what comes back.
//!
//! daymark has no plan nodes and no table providers of its own (its tables are
//! DataFusion's listing tables over Parquet), so the codec carries functions only. One
//! physical optimiser rule, [`daymark_engine::window_totals::OnePhaseTotals`], runs where
//! plans are made: a scheduler that does not have it still runs the same aggregate, in
//! DataFusion's usual two phases.

use async_trait::async_trait;
use datafusion::arrow::datatypes::SchemaRef;
use datafusion::catalog::Session;
use datafusion::catalog::TableProvider;
use datafusion::common::{not_impl_err, DataFusionError, Result, TableReference};
use datafusion::execution::context::QueryPlanner;
use datafusion::execution::TaskContext;
use datafusion::logical_expr::{AggregateUDF, Extension, LogicalPlan, WindowUDF};
use datafusion::physical_plan::ExecutionPlan;
use datafusion::physical_planner::{DefaultPhysicalPlanner, PhysicalPlanner};
use datafusion::prelude::SessionContext;
use datafusion_proto::bytes::{
    logical_plan_from_bytes_with_extension_codec, logical_plan_to_bytes_with_extension_codec,
    physical_plan_from_bytes_with_extension_codec, physical_plan_to_bytes_with_extension_codec,
};
use datafusion_proto::logical_plan::LogicalExtensionCodec;
use datafusion_proto::physical_plan::{PhysicalExtensionCodec, PhysicalProtoConverterExtension};
use std::collections::BTreeMap;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};

/// daymark's window function called `name`, if it is one.
pub fn window_function(name: &str) -> Option<Arc<WindowUDF>> {
    let mut all = daymark_engine::functions::running_functions();
    all.push(WindowUDF::from(
        daymark_engine::functions::FirstCopy::default(),
    ));
    all.into_iter().find(|f| f.name() == name).map(Arc::new)
}

/// daymark's aggregate function called `name`, if it is one.
pub fn aggregate_function(name: &str) -> Option<Arc<AggregateUDF>> {
    let mut all = daymark_engine::latest::functions();
    all.push(AggregateUDF::from(
        daymark_engine::window_totals::WindowTotalsAggregate::default(),
    ));
    all.into_iter().find(|f| f.name() == name).map(Arc::new)
}

/// The extension codec for daymark's plans, logical and physical.
///
/// A daymark function is encoded as its name (its only parameter: each function's
/// behaviour follows from its name and its arguments' types) and decoded from it; other
/// functions are left to DataFusion (by name, from the decoding session's registry). The
/// codec counts the functions it decodes ([`DaymarkCodec::decoded`]).
#[derive(Debug, Default, Clone)]
pub struct DaymarkCodec {
    decoded: Arc<Mutex<BTreeMap<String, u64>>>,
}

impl DaymarkCodec {
    /// How many times each daymark function was decoded by this codec (or its clones).
    pub fn decoded(&self) -> BTreeMap<String, u64> {
        self.decoded.lock().map(|m| m.clone()).unwrap_or_default()
    }

    /// The name a function was encoded under: the payload, or `name` when there is none
    /// (DataFusion asks the codec with an empty payload when its registry lacks `name`).
    fn name_in<'a>(name: &'a str, buf: &'a [u8]) -> Result<&'a str> {
        if buf.is_empty() {
            return Ok(name);
        }
        std::str::from_utf8(buf).or_else(|_| {
            not_impl_err!("function {name}: its payload is not one of daymark's function names")
        })
    }

    fn count(&self, name: &str) {
        if let Ok(mut m) = self.decoded.lock() {
            *m.entry(name.to_string()).or_default() += 1;
        }
    }

    fn decode_udwf(&self, name: &str, buf: &[u8]) -> Result<Arc<WindowUDF>> {
        let name = Self::name_in(name, buf)?;
        match window_function(name) {
            Some(f) => {
                self.count(name);
                Ok(f)
            }
            None => not_impl_err!("window function {name} is neither built in nor daymark's"),
        }
    }

    fn decode_udaf(&self, name: &str, buf: &[u8]) -> Result<Arc<AggregateUDF>> {
        let name = Self::name_in(name, buf)?;
        match aggregate_function(name) {
            Some(f) => {
                self.count(name);
                Ok(f)
            }
            None => not_impl_err!("aggregate function {name} is neither built in nor daymark's"),
        }
    }
}

/// Encodes `name` when it is one of daymark's functions (`ours`), else nothing.
fn encode_name(name: &str, ours: bool, buf: &mut Vec<u8>) -> Result<()> {
    if ours {
        buf.extend_from_slice(name.as_bytes());
    }
    Ok(())
}

impl LogicalExtensionCodec for DaymarkCodec {
    fn try_decode(
        &self,
        _buf: &[u8],
        _inputs: &[LogicalPlan],
        _ctx: &TaskContext,
    ) -> Result<Extension> {
        not_impl_err!("daymark has no logical plan nodes of its own")
    }

    fn try_encode(&self, node: &Extension, _buf: &mut Vec<u8>) -> Result<()> {
        not_impl_err!(
            "daymark has no logical plan nodes of its own: {}",
            node.node.name()
        )
    }

    fn try_decode_table_provider(
        &self,
        _buf: &[u8],
        table_ref: &TableReference,
        _schema: SchemaRef,
        _ctx: &TaskContext,
    ) -> Result<Arc<dyn TableProvider>> {
        not_impl_err!("table {table_ref}: daymark reads listing tables only")
    }

    fn try_encode_table_provider(
        &self,
        table_ref: &TableReference,
        _node: Arc<dyn TableProvider>,
        _buf: &mut Vec<u8>,
    ) -> Result<()> {
        not_impl_err!("table {table_ref}: daymark reads listing tables only")
    }

    fn try_decode_udaf(&self, name: &str, buf: &[u8]) -> Result<Arc<AggregateUDF>> {
        self.decode_udaf(name, buf)
    }

    fn try_encode_udaf(&self, node: &AggregateUDF, buf: &mut Vec<u8>) -> Result<()> {
        encode_name(node.name(), aggregate_function(node.name()).is_some(), buf)
    }

    fn try_decode_udwf(&self, name: &str, buf: &[u8]) -> Result<Arc<WindowUDF>> {
        self.decode_udwf(name, buf)
    }

    fn try_encode_udwf(&self, node: &WindowUDF, buf: &mut Vec<u8>) -> Result<()> {
        encode_name(node.name(), window_function(node.name()).is_some(), buf)
    }
}

impl PhysicalExtensionCodec for DaymarkCodec {
    fn try_decode(
        &self,
        _buf: &[u8],
        _inputs: &[Arc<dyn ExecutionPlan>],
        _ctx: &TaskContext,
        _proto_converter: &dyn PhysicalProtoConverterExtension,
    ) -> Result<Arc<dyn ExecutionPlan>> {
        not_impl_err!("daymark has no physical plan nodes of its own")
    }

    fn try_encode(
        &self,
        node: Arc<dyn ExecutionPlan>,
        _buf: &mut Vec<u8>,
        _proto_converter: &dyn PhysicalProtoConverterExtension,
    ) -> Result<()> {
        not_impl_err!(
            "plan node {} has no serialisation (DataFusion's or daymark's)",
            node.name()
        )
    }

    fn try_decode_udaf(&self, name: &str, buf: &[u8]) -> Result<Arc<AggregateUDF>> {
        self.decode_udaf(name, buf)
    }

    fn try_encode_udaf(&self, node: &AggregateUDF, buf: &mut Vec<u8>) -> Result<()> {
        encode_name(node.name(), aggregate_function(node.name()).is_some(), buf)
    }

    fn try_decode_udwf(&self, name: &str, buf: &[u8]) -> Result<Arc<WindowUDF>> {
        self.decode_udwf(name, buf)
    }

    fn try_encode_udwf(&self, node: &WindowUDF, buf: &mut Vec<u8>) -> Result<()> {
        encode_name(node.name(), window_function(node.name()).is_some(), buf)
    }
}

/// A query planner that sends each plan through protobuf before running it, as a cluster
/// would: the optimised logical plan is encoded and decoded, planned by DataFusion's
/// planner in the session (with the session's physical optimiser rules), and the
/// physical plan is encoded and decoded again. Both decodings happen in a context that
/// knows only DataFusion's built-in functions, so daymark's functions arrive through
/// [`DaymarkCodec`] or not at all.
#[derive(Debug)]
pub struct RoundTripPlanner {
    codec: DaymarkCodec,
    bare: Arc<TaskContext>,
    plans: AtomicU64,
    bytes: AtomicU64,
}

impl Default for RoundTripPlanner {
    fn default() -> Self {
        RoundTripPlanner {
            codec: DaymarkCodec::default(),
            bare: SessionContext::new().task_ctx(),
            plans: AtomicU64::new(0),
            bytes: AtomicU64::new(0),
        }
    }
}

impl RoundTripPlanner {
    /// Plans sent through protobuf so far.
    pub fn plans(&self) -> u64 {
        self.plans.load(Ordering::Relaxed)
    }

    /// Bytes of protobuf written so far, logical and physical plans together.
    pub fn bytes(&self) -> u64 {
        self.bytes.load(Ordering::Relaxed)
    }

    /// How many times each daymark function was decoded (see [`DaymarkCodec::decoded`]).
    pub fn decoded(&self) -> BTreeMap<String, u64> {
        self.codec.decoded()
    }
}

/// Stack for encoding and decoding a plan: prost and DataFusion's conversions recurse once
/// per level of the plan, and a range query's plan is more than 100 levels deep (a debug
/// build overflowed a test thread's 2 MiB). Reserved, not touched, until used.
const SERDE_STACK: usize = 256 << 20;

/// Runs `f` on a thread with [`SERDE_STACK`] of stack.
fn on_big_stack<T: Send>(f: impl FnOnce() -> Result<T> + Send) -> Result<T> {
    std::thread::scope(|s| {
        let thread = std::thread::Builder::new()
            .name("daymark-plan-serde".into())
            .stack_size(SERDE_STACK)
            .spawn_scoped(s, f)
            .map_err(|e| DataFusionError::External(Box::new(e)))?;
        thread.join().unwrap_or_else(|_| {
            Err(DataFusionError::Internal(
                "plan serialisation panicked".into(),
            ))
        })
    })
}

#[async_trait]
impl QueryPlanner for RoundTripPlanner {
    async fn create_physical_plan(
        &self,
        logical_plan: &LogicalPlan,
        session_state: &dyn Session,
    ) -> Result<Arc<dyn ExecutionPlan>> {
        let (sent, received) = on_big_stack(|| {
            let sent = logical_plan_to_bytes_with_extension_codec(logical_plan, &self.codec)?;
            let received =
                logical_plan_from_bytes_with_extension_codec(&sent, &self.bare, &self.codec)?;
            Ok((sent.len(), received))
        })?;
        let physical = DefaultPhysicalPlanner::default()
            .create_physical_plan(&received, session_state)
            .await?;
        let (shipped, plan) = on_big_stack(|| {
            let shipped = physical_plan_to_bytes_with_extension_codec(physical, &self.codec)?;
            let plan =
                physical_plan_from_bytes_with_extension_codec(&shipped, &self.bare, &self.codec)?;
            Ok((shipped.len(), plan))
        })?;
        self.plans.fetch_add(1, Ordering::Relaxed);
        self.bytes
            .fetch_add((sent + shipped) as u64, Ordering::Relaxed);
        Ok(plan)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use datafusion::arrow::util::pretty::pretty_format_batches;
    use datafusion_proto::bytes::{logical_plan_from_bytes, logical_plan_to_bytes};

    /// Two of daymark's window functions over three rows of an inline table (a table in
    /// memory would not serialise).
    const SQL: &str =
        "SELECT k, v, daymark_first_copy(v) OVER (PARTITION BY k ORDER BY v) AS first, \
         daymark_running_sum(v) OVER (PARTITION BY k ORDER BY v) AS total \
         FROM (VALUES (1, 5), (1, 5), (1, 7), (2, 3)) AS t(k, v) ORDER BY k, v";

    async fn rows(planner: Option<Arc<RoundTripPlanner>>) -> String {
        let opts = daymark_engine::session::EngineOptions {
            query_planner: planner.map(|p| p as _),
            ..Default::default()
        };
        let ctx = daymark_engine::session::session(&opts).unwrap();
        let batches = ctx.sql(SQL).await.unwrap().collect().await.unwrap();
        pretty_format_batches(&batches).unwrap().to_string()
    }

    #[tokio::test]
    async fn a_plan_with_daymark_functions_runs_after_protobuf() {
        let planner = Arc::new(RoundTripPlanner::default());
        let shipped = rows(Some(planner.clone())).await;
        assert_eq!(shipped, rows(None).await);
        // Worked by hand: per k in v order, the first of equal values, and running sums.
        let expected = "\
+---+---+-------+-------+
| k | v | first | total |
+---+---+-------+-------+
| 1 | 5 | true  | 5     |
| 1 | 5 | false | 10    |
| 1 | 7 | true  | 17    |
| 2 | 3 | true  | 3     |
+---+---+-------+-------+";
        assert_eq!(shipped, expected);
        assert_eq!(planner.plans(), 1);
        // Once in the logical plan, once in the physical plan.
        let decoded = planner.decoded();
        assert_eq!(decoded.get("daymark_first_copy"), Some(&2), "{decoded:?}");
        assert_eq!(decoded.get("daymark_running_sum"), Some(&2), "{decoded:?}");
    }

    /// `daymark_latest` and `daymark_earliest` in both aggregation phases, shipped as a
    /// cluster would ship them.
    #[tokio::test]
    async fn the_latest_value_aggregate_runs_after_protobuf() {
        let planner = Arc::new(RoundTripPlanner::default());
        let opts = daymark_engine::session::EngineOptions {
            query_planner: Some(planner.clone() as _),
            ..Default::default()
        };
        let ctx = daymark_engine::session::session(&opts).unwrap();
        let sql = "SELECT k, daymark_latest(s, t, a) AS latest, \
                   daymark_earliest(s, t, a) AS earliest \
                   FROM (VALUES (1, 'active', 2, 9), (1, 'paused', 1, 10), (2, 'b', 5, 6), \
                   (2, 'a', 5, 7), (3, 'x', NULL, 1), (3, 'y', 4, 2)) AS r(k, s, t, a) \
                   GROUP BY k ORDER BY k";
        let batches = ctx.sql(sql).await.unwrap().collect().await.unwrap();
        // Worked by hand: per k, the status of the greatest and of the least (t, a), a
        // NULL t greatest.
        let expected = "\
+---+--------+----------+
| k | latest | earliest |
+---+--------+----------+
| 1 | active | paused   |
| 2 | a      | b        |
| 3 | x      | y        |
+---+--------+----------+";
        assert_eq!(
            pretty_format_batches(&batches).unwrap().to_string(),
            expected
        );
        let decoded = planner.decoded();
        assert!(decoded.get("daymark_latest") >= Some(&2), "{decoded:?}");
        assert!(decoded.get("daymark_earliest") >= Some(&2), "{decoded:?}");
    }

    #[tokio::test]
    async fn without_the_codec_a_plan_does_not_decode_and_says_which_function() {
        let ctx = daymark_engine::session::session(&Default::default()).unwrap();
        let plan = ctx.sql(SQL).await.unwrap().into_optimized_plan().unwrap();
        let bare = SessionContext::new().task_ctx();
        let plain = logical_plan_to_bytes(&plan).unwrap();
        let err = logical_plan_from_bytes(&plain, &bare)
            .unwrap_err()
            .to_string();
        assert!(err.contains("daymark_"), "{err}");
        let codec = DaymarkCodec::default();
        let ours = logical_plan_to_bytes_with_extension_codec(&plan, &codec).unwrap();
        let back = logical_plan_from_bytes_with_extension_codec(&ours, &bare, &codec).unwrap();
        assert_eq!(back.schema(), plan.schema());
    }

    #[test]
    fn unknown_names_are_refused_with_the_name() {
        let codec = DaymarkCodec::default();
        let err = codec.decode_udwf("nope", &[]).unwrap_err().to_string();
        assert!(err.contains("window function nope"), "{err}");
        let err = codec
            .decode_udaf("x", b"daymark_other")
            .unwrap_err()
            .to_string();
        assert!(err.contains("daymark_other"), "{err}");
        assert!(codec.decoded().is_empty());
        assert!(window_function(daymark_engine::functions::RUNNING_MAX).is_some());
        assert!(aggregate_function(daymark_engine::window_totals::WINDOW_TOTALS).is_some());
        assert!(aggregate_function(daymark_engine::latest::LATEST).is_some());
        assert!(aggregate_function(daymark_engine::latest::EARLIEST).is_some());
    }
}
