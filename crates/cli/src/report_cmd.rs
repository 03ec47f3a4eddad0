//! `daymark report`: one self-contained HTML file on the built outputs.

use crate::audit_cmd::{prepare, AuditArgs};
use crate::exit;
use anyhow::{Context, Result};
use std::path::Path;

/// `daymark report`.
pub async fn run(args: AuditArgs, html: &Path) -> Result<u8> {
    let p = match prepare(&args).await? {
        Ok(p) => p,
        Err(code) => return Ok(code),
    };
    let page = daymark_audit::report::report(&p.ctx, &p.pipeline, &p.out, &p.options).await?;
    // The report is a local convenience: the user names a local path.
    std::fs::write(html, page.html.as_bytes())
        .with_context(|| format!("writing {}", html.display()))?;
    println!(
        "wrote {} ({} charts, {} snapshot day(s), audit {})",
        html.display(),
        page.charts,
        page.days,
        if page.audit_passed {
            "passed"
        } else {
            "FAILED"
        }
    );
    Ok(exit::OK)
}
