//! The `daymark` command line.

/// `println!` and `print!` that do not panic when standard output is a closed pipe
/// (`daymark ... | head`): the text is dropped and the command goes on with its work, which
/// ends as it would have. Other write errors are reported on standard error. (Rust's own
/// macros panic on any write error.) Defined before the modules so they all use them.
macro_rules! println {
    () => {
        $crate::write_out(format_args!("\n"))
    };
    ($($arg:tt)*) => {
        $crate::write_out(format_args!("{}\n", format_args!($($arg)*)))
    };
}

/// See [`println!`].
macro_rules! print {
    ($($arg:tt)*) => {
        $crate::write_out(format_args!($($arg)*))
    };
}

/// Writes to standard output for [`println!`] and [`print!`].
fn write_out(text: std::fmt::Arguments) {
    use std::io::Write;
    if let Err(e) = std::io::stdout().lock().write_fmt(text) {
        if e.kind() != std::io::ErrorKind::BrokenPipe {
            eprintln!("daymark: cannot write to standard output: {e}");
        }
    }
}

mod audit_cmd;
mod commands;
mod export_cmd;
mod labels_cmd;
mod outcomes_cmd;
mod report;
mod report_cmd;
mod run_cmd;
mod status_cmd;
mod tidy_cmd;
mod watch_cmd;

use clap::{Parser, Subcommand};
use std::path::PathBuf;
use std::process::ExitCode;

/// Daily, point-in-time-correct customer feature snapshots from partitioned Parquet logs.
#[derive(Parser)]
#[command(name = "daymark", version, about, long_about = None)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Check a pipeline file against its sources and print what it reads and computes.
    ///
    /// Example: daymark check pipelines/demo.yaml
    #[command(
        after_help = "Example:\n  daymark check pipelines/demo.yaml\n  daymark check pipelines/demo.yaml --json"
    )]
    Check {
        /// The pipeline file.
        pipeline: PathBuf,
        /// Print a JSON report instead of text.
        #[arg(long)]
        json: bool,
    },
    /// Show what would run for one snapshot day: cutoff, partitions read, and the SQL.
    #[command(
        after_help = "Example:\n  daymark explain pipelines/demo.yaml --date 2026-03-09 --plan"
    )]
    Explain {
        /// The pipeline file.
        pipeline: PathBuf,
        /// The snapshot day (YYYY-MM-DD).
        #[arg(long)]
        date: String,
        /// Knowledge mode for every source: `as-known` or `event-time` (default: each
        /// source's own).
        #[arg(long)]
        knowledge: Option<String>,
        /// Also print DataFusion's optimised logical plan of the query.
        #[arg(long)]
        plan: bool,
    },
    /// Build daily snapshots for one day or a range of days (a backfill) and publish them.
    #[command(
        after_help = "Example:\n  daymark build pipelines/demo.yaml --date 2026-03-09\n  daymark build pipelines/demo.yaml --from 2026-02-01 --to 2026-04-30 --memory-limit 2GiB"
    )]
    Build(commands::BuildArgs),
    /// Generate the demo world's event logs (an invented streaming service).
    #[command(
        after_help = "Example:\n  daymark generate --out demo-data/world --customers 5000 --days 120 --start 2026-01-01 --seed 7"
    )]
    Generate(commands::GenerateArgs),
    /// Generate the demo world if absent, then check and explain the demo pipeline on it.
    #[command(
        after_help = "Example:\n  daymark demo\n  daymark demo --dir /tmp/daymark-demo --customers 20000"
    )]
    Demo {
        /// Folder for the demo world and its pipeline file.
        #[arg(long, default_value = "demo-data")]
        dir: PathBuf,
        /// Customers in the demo world (used only when generating it).
        #[arg(long, default_value_t = 4000)]
        customers: u32,
        /// Days of logs in the demo world (used only when generating it).
        #[arg(long, default_value_t = 120)]
        days: u32,
    },
    /// Back-fill the labels of built snapshots whose label window has closed.
    #[command(
        after_help = "Example:\n  daymark labels pipelines/demo.yaml\n  daymark labels pipelines/demo.yaml --until 2026-03-31 --json"
    )]
    Labels(labels_cmd::LabelsArgs),
    /// Write a training set: snapshots joined with matured labels, split by date with an embargo.
    #[command(
        after_help = "Example:\n  daymark export pipelines/demo.yaml --from 2026-02-01 --to 2026-04-30 --out training --split 0.7,0.15,0.15"
    )]
    Export(export_cmd::ExportArgs),
    /// Measure a model's scores against matured labels, per scoring day.
    #[command(
        after_help = "Example:\n  daymark outcomes pipelines/demo.yaml --scores scores.parquet --top-k 100 --min-auc 0.6"
    )]
    Outcomes(outcomes_cmd::OutcomesArgs),
    /// Audit built snapshots for leakage: plan, provenance, recomputation, label scan, skew.
    #[command(
        after_help = "Example:\n  daymark audit pipelines/demo.yaml\n  daymark audit pipelines/demo.yaml --from 2026-03-01 --to 2026-03-31 --sample 500 --seed 7 --json"
    )]
    Audit {
        #[command(flatten)]
        args: audit_cmd::AuditArgs,
        /// Print JSON instead of a table.
        #[arg(long)]
        json: bool,
    },
    /// Write one self-contained HTML report (inline SVG charts) on the built outputs.
    #[command(after_help = "Example:\n  daymark report pipelines/demo.yaml --out report.html")]
    Report {
        #[command(flatten)]
        args: audit_cmd::AuditArgs,
        /// The HTML file to write (a local path).
        #[arg(long)]
        out: PathBuf,
    },
    /// Do what is due: new snapshot days whose inputs are complete, stale days; exit codes
    /// for schedulers (0 work done, 10 nothing due, 11 waiting for inputs, 12 lock held).
    #[command(
        after_help = "Example:\n  daymark run pipelines/demo.yaml\n  daymark run pipelines/demo.yaml --from 2026-02-01 --until 2026-04-30 --dry-run"
    )]
    Run(run_cmd::RunArgs),
    /// Show which snapshot days are built, stale (and why), new or pending, from the ledger.
    #[command(after_help = "Example:\n  daymark status pipelines/demo.yaml --json")]
    Status(status_cmd::StatusArgs),
    /// Keep running: poll the sources, run what is due, serve /health and /metrics.
    #[command(
        after_help = "Example:\n  daymark watch pipelines/demo.yaml --interval 30s --listen 127.0.0.1:9797"
    )]
    Watch(watch_cmd::WatchArgs),
    /// List the tile folders the pipeline no longer reads (left by changed definitions);
    /// remove them with --apply.
    #[command(
        after_help = "Example:\n  daymark tidy pipelines/demo.yaml\n  daymark tidy pipelines/demo.yaml --apply"
    )]
    Tidy(tidy_cmd::TidyArgs),
    /// Print the JSON Schema of pipeline files (for editors).
    #[command(after_help = "Example:\n  daymark schema > pipeline.schema.json")]
    Schema,
}

/// Exit codes (documented in the README).
pub mod exit {
    /// Success.
    pub const OK: u8 = 0;
    /// The pipeline file or its inputs are invalid.
    pub const INVALID: u8 = 2;
    /// Anything else went wrong (I/O, engine).
    pub const FAILED: u8 = 1;
    /// A check configured to fail did fail; nothing was published for that day.
    pub const CHECK_FAILED: u8 = 3;
    /// `run`: nothing was due.
    pub const NOTHING_DUE: u8 = 10;
    /// `run`: nothing could be done yet; inputs are not complete.
    pub const WAITING: u8 = 11;
    /// `run`, `build`, `tidy --apply`: another run holds the output lock.
    pub const LOCK_HELD: u8 = 12;
}

/// Set to `1`, every plan the command runs is sent through DataFusion's protobuf (logical,
/// then physical) and decoded where only built-in functions are known before it runs, as on
/// a cluster; the tally goes to standard error at the end. A check for developers.
const PLANS_THROUGH_PROTOBUF: &str = "DAYMARK_PLANS_THROUGH_PROTOBUF";

fn main() -> ExitCode {
    let cli = Cli::parse();
    let round_trip = (std::env::var(PLANS_THROUGH_PROTOBUF).as_deref() == Ok("1")).then(|| {
        let planner = std::sync::Arc::new(daymark_codec::RoundTripPlanner::default());
        daymark_engine::session::set_default_query_planner(planner.clone());
        planner
    });
    let runtime = match tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
    {
        Ok(r) => r,
        Err(e) => {
            eprintln!("error: cannot start the async runtime: {e}");
            return ExitCode::from(exit::FAILED);
        }
    };
    let result = runtime.block_on(async {
        match cli.command {
            Command::Check { pipeline, json } => commands::check(&pipeline, json).await,
            Command::Explain {
                pipeline,
                date,
                knowledge,
                plan,
            } => commands::explain(&pipeline, &date, knowledge.as_deref(), plan, false).await,
            Command::Build(args) => commands::build(args).await,
            Command::Generate(args) => commands::generate(args),
            Command::Demo {
                dir,
                customers,
                days,
            } => commands::demo(&dir, customers, days).await,
            Command::Labels(args) => labels_cmd::labels(args).await,
            Command::Export(args) => export_cmd::export(args).await,
            Command::Outcomes(args) => outcomes_cmd::outcomes(args).await,
            Command::Audit { args, json } => audit_cmd::run(args, json).await,
            Command::Report { args, out } => report_cmd::run(args, &out).await,
            Command::Run(args) => run_cmd::run(args).await,
            Command::Status(args) => status_cmd::status(args).await,
            Command::Watch(args) => watch_cmd::watch_cmd(args).await,
            Command::Tidy(args) => tidy_cmd::tidy(args).await,
            Command::Schema => {
                print!("{}", daymark_spec::json_schema());
                Ok(exit::OK)
            }
        }
    });
    if let Some(p) = round_trip {
        eprintln!(
            "{PLANS_THROUGH_PROTOBUF}: {} plan(s) sent through protobuf ({} bytes); daymark functions decoded: {:?}",
            p.plans(),
            p.bytes(),
            p.decoded()
        );
    }
    match result {
        Ok(code) => ExitCode::from(code),
        Err(e) => {
            eprintln!("error: {e:#}");
            if e.downcast_ref::<commands::InvalidInput>().is_some() {
                ExitCode::from(exit::INVALID)
            } else {
                ExitCode::from(exit::FAILED)
            }
        }
    }
}
