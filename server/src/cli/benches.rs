//! `halfwave benches` and `halfwave acknowledge`: the benches' queues and RF safety state, and the
//! operator's acknowledgement after a safety fault. Clients: HTTP only.
//!
//! After a bench's RF output could not be confirmed off, the daemon holds the bench (no run
//! starts) until the output reads back off *and* an operator has looked at the bench and
//! acknowledged; the acknowledgement and its note go to the audit log.

use super::client::ClientArgs;
use super::runs::runtime;
use super::text_table::{Align, TextTable};
use super::CliError;
use crate::engine::rf_safety::SafetyState;
use crate::engine::BenchStatus;
use clap::Args;

#[derive(Debug, Args)]
pub struct BenchesArgs {
    #[command(flatten)]
    pub client: ClientArgs,
}

#[derive(Debug, Args)]
pub struct AcknowledgeArgs {
    /// The bench whose safety fault to acknowledge (its RF output must read back off already).
    pub bench: String,
    /// What was checked on the bench (kept in the audit log).
    #[arg(long, default_value = "")]
    pub note: String,
    #[command(flatten)]
    pub client: ClientArgs,
}

/// Lists the benches with their queue and RF safety state.
pub fn list(args: BenchesArgs) -> Result<(), CliError> {
    let client = args.client.client()?;
    runtime()?.block_on(async {
        let benches: Vec<BenchStatus> = client.get_json("/api/v1/benches").await?;
        if args.client.json {
            let text = serde_json::to_string_pretty(&benches)
                .map_err(|e| CliError::caused("cannot write JSON", e))?;
            outln!("{text}");
            return Ok(());
        }
        let mut table = TextTable::new(&[
            ("bench", Align::Left),
            ("RF safety", Align::Left),
            ("active run", Align::Right),
            ("queued", Align::Left),
        ]);
        for b in &benches {
            let queued: Vec<String> = b.queued_run_ids.iter().map(ToString::to_string).collect();
            table.row(vec![
                b.name.clone(),
                b.safety_state.as_str().to_string(),
                b.active_run_id
                    .map_or_else(|| "idle".to_string(), |id| id.to_string()),
                if queued.is_empty() {
                    "none".to_string()
                } else {
                    queued.join(",")
                },
            ]);
        }
        out!("{}", table.render());
        for b in &benches {
            if let Some(fault) = &b.safety_fault {
                outln!("bench {}:", b.name);
                outln!("  cause: {}", fault.cause);
                match b.safety_state {
                    SafetyState::OutputUnconfirmed => outln!(
                        "  the daemon keeps trying to switch the output off; check the source and its link"
                    ),
                    _ => outln!(
                        "  the output reads back off; check the bench, then: halfwave acknowledge {} --note \"...\"",
                        b.name
                    ),
                }
            }
        }
        Ok(())
    })
}

/// Acknowledges a bench's safety fault.
pub fn acknowledge(args: AcknowledgeArgs) -> Result<(), CliError> {
    let client = args.client.client()?;
    runtime()?.block_on(async {
        let path = format!(
            "/api/v1/benches/{}/acknowledge",
            encode_segment(&args.bench)
        );
        client
            .post_no_content(&path, &serde_json::json!({ "note": args.note }))
            .await?;
        if args.client.json {
            outln!(
                "{}",
                serde_json::json!({ "bench": args.bench, "acknowledged": true })
            );
        } else {
            outln!(
                "bench {} acknowledged: it takes runs again (recorded in the audit log)",
                args.bench
            );
        }
        Ok(())
    })
}

/// Percent-encodes a path segment (bench names may hold spaces).
fn encode_segment(segment: &str) -> String {
    form_urlencoded::byte_serialize(segment.as_bytes())
        .collect::<String>()
        .replace('+', "%20")
}
