//! Prometheus metrics: the engine exposes plain counters; this module renders them with
//! the prometheus crate at the edge. Names follow Prometheus conventions (base units,
//! `_total` for counters) and include every name the outside contract fixes.

use prometheus::{
    Encoder, Gauge, IntCounter, IntCounterVec, IntGauge, Opts, Registry, TextEncoder,
};

use crate::engine::Counters;

/// Every metric scrim exports.
pub struct Metrics {
    registry: Registry,
    events: IntCounterVec,
    rejected: IntCounterVec,
    dropped: IntCounterVec,
    releases: IntCounterVec,
    /// Lifetime zCDP left (unit level; +Inf at event level, where epochs compose in parallel).
    pub budget_remaining: Gauge,
    /// Lifetime zCDP spent.
    pub budget_spent: Gauge,
    /// 1 when the budget could not cover an epoch and releases stopped.
    pub budget_exhausted: IntGauge,
    /// Windows left in the current epoch.
    pub epoch_windows_remaining: IntGauge,
    /// Seconds from a window's end to the publication of its releases (last window).
    pub release_lag: Gauge,
    /// Unix time of the last publication.
    pub last_release_time: Gauge,
    /// Estimated seconds until the lifetime budget runs out at the configured cadence.
    pub budget_exhaustion_eta: Gauge,
    /// Batches waiting in the ingest queue.
    pub ingest_queue_depth: IntGauge,
    /// Bytes read from all sources.
    pub input_bytes: IntCounter,
    /// Open TCP connections.
    pub tcp_connections: IntGauge,
    /// Windows currently open.
    pub windows_open: IntGauge,
    /// Windows closed.
    pub windows_closed: IntCounter,
    /// Largest event time seen minus the allowed lateness (Unix seconds).
    pub watermark: Gauge,
    seen: Counters,
}

fn must<T>(r: Result<T, prometheus::Error>) -> T {
    // Metric construction fails only on invalid names or duplicate registration, which
    // are programming errors fixed at compile time here; a test constructs every metric.
    r.unwrap_or_else(|e| panic!("metric definition: {e}"))
}

impl Metrics {
    /// Registers every metric, including the process collector.
    pub fn new() -> Metrics {
        let registry = Registry::new();
        let events = must(IntCounterVec::new(
            Opts::new(
                "scrim_events_total",
                "Input events by outcome (accepted, rejected, late)",
            ),
            &["outcome"],
        ));
        let rejected = must(IntCounterVec::new(
            Opts::new(
                "scrim_rejected_events_total",
                "Rejected input lines by reason",
            ),
            &["reason"],
        ));
        let dropped = must(IntCounterVec::new(
            Opts::new(
                "scrim_bounded_events_total",
                "Accepted events dropped by contribution bounds (counted by the time their window closes)",
            ),
            &["bound"],
        ));
        let releases = must(IntCounterVec::new(
            Opts::new(
                "scrim_releases_total",
                "Release records published, by statistic",
            ),
            &["stat"],
        ));
        let g = |name: &str, help: &str| must(Gauge::new(name, help));
        let ig = |name: &str, help: &str| must(IntGauge::new(name, help));
        let m = Metrics {
            budget_remaining: g(
                "scrim_budget_remaining_rho",
                "Lifetime zCDP budget left per privacy unit",
            ),
            budget_spent: g(
                "scrim_budget_spent_rho",
                "Lifetime zCDP budget spent per privacy unit",
            ),
            budget_exhausted: ig(
                "scrim_budget_exhausted",
                "1 when releases stopped because the budget ran out",
            ),
            epoch_windows_remaining: ig(
                "scrim_epoch_windows_remaining",
                "Windows left in the current epoch",
            ),
            release_lag: g(
                "scrim_release_lag_seconds",
                "Seconds from window end to publication (last window)",
            ),
            last_release_time: g(
                "scrim_last_release_timestamp_seconds",
                "Unix time of the last publication",
            ),
            budget_exhaustion_eta: g(
                "scrim_budget_exhaustion_eta_seconds",
                "Estimated seconds until the lifetime budget cannot cover another epoch",
            ),
            ingest_queue_depth: ig(
                "scrim_ingest_queue_depth",
                "Input batches waiting for the engine",
            ),
            input_bytes: must(IntCounter::new(
                "scrim_input_bytes_total",
                "Bytes read from all sources",
            )),
            tcp_connections: ig("scrim_tcp_connections", "Open TCP ingest connections"),
            windows_open: ig("scrim_windows_open", "Windows currently open"),
            windows_closed: must(IntCounter::new(
                "scrim_windows_closed_total",
                "Windows closed",
            )),
            watermark: g(
                "scrim_watermark_timestamp_seconds",
                "Event-time watermark (Unix seconds)",
            ),
            registry,
            events,
            rejected,
            dropped,
            releases,
            seen: Counters::default(),
        };
        for c in [
            Box::new(m.events.clone()) as Box<dyn prometheus::core::Collector>,
            Box::new(m.rejected.clone()),
            Box::new(m.dropped.clone()),
            Box::new(m.releases.clone()),
            Box::new(m.budget_remaining.clone()),
            Box::new(m.budget_spent.clone()),
            Box::new(m.budget_exhausted.clone()),
            Box::new(m.epoch_windows_remaining.clone()),
            Box::new(m.release_lag.clone()),
            Box::new(m.last_release_time.clone()),
            Box::new(m.budget_exhaustion_eta.clone()),
            Box::new(m.ingest_queue_depth.clone()),
            Box::new(m.input_bytes.clone()),
            Box::new(m.tcp_connections.clone()),
            Box::new(m.windows_open.clone()),
            Box::new(m.windows_closed.clone()),
            Box::new(m.watermark.clone()),
        ] {
            must(m.registry.register(c));
        }
        #[cfg(target_os = "linux")]
        must(m.registry.register(Box::new(
            prometheus::process_collector::ProcessCollector::for_self(),
        )));
        // Pre-create label values so dashboards and alerts see zeros, not absent series.
        for o in ["accepted", "rejected", "late"] {
            m.events.with_label_values(&[o]).inc_by(0);
        }
        for r in crate::engine::event::RejectReason::ALL {
            m.rejected.with_label_values(&[r.label()]).inc_by(0);
        }
        m.rejected
            .with_label_values(&[crate::engine::core::REJECT_TIME_JUMP])
            .inc_by(0);
        for b in ["events_per_window", "windows_per_epoch"] {
            m.dropped.with_label_values(&[b]).inc_by(0);
        }
        m
    }

    /// Pre-creates the per-statistic release series.
    pub fn declare_stats<'a>(&self, names: impl IntoIterator<Item = &'a str>) {
        for n in names {
            self.releases.with_label_values(&[n]).inc_by(0);
        }
    }

    /// Brings counters up to date with the engine's (they only grow).
    pub fn observe(&mut self, c: &Counters) {
        let d = |now: u64, then: u64| now.saturating_sub(then);
        self.events
            .with_label_values(&["accepted"])
            .inc_by(d(c.accepted, self.seen.accepted));
        self.events
            .with_label_values(&["late"])
            .inc_by(d(c.late, self.seen.late));
        self.events
            .with_label_values(&["rejected"])
            .inc_by(d(c.rejected_total(), self.seen.rejected_total()));
        for (reason, n) in &c.rejected {
            let before = self.seen.rejected.get(reason).copied().unwrap_or(0);
            self.rejected
                .with_label_values(&[reason])
                .inc_by(d(*n, before));
        }
        self.dropped
            .with_label_values(&["events_per_window"])
            .inc_by(d(c.dropped_event_bound, self.seen.dropped_event_bound));
        self.dropped
            .with_label_values(&["windows_per_epoch"])
            .inc_by(d(c.dropped_window_bound, self.seen.dropped_window_bound));
        for (stat, n) in &c.releases {
            let before = self.seen.releases.get(stat).copied().unwrap_or(0);
            self.releases
                .with_label_values(&[stat])
                .inc_by(d(*n, before));
        }
        self.windows_closed
            .inc_by(d(c.windows_closed, self.seen.windows_closed));
        self.seen = c.clone();
    }

    /// The Prometheus text exposition.
    pub fn render(&self) -> String {
        let mut buf = Vec::new();
        let _ = TextEncoder::new().encode(&self.registry.gather(), &mut buf);
        String::from_utf8(buf).unwrap_or_default()
    }
}

impl Default for Metrics {
    fn default() -> Metrics {
        Metrics::new()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn contract_metric_names_are_exported() {
        let mut m = Metrics::new();
        m.declare_stats(["taps"]);
        let mut c = Counters {
            accepted: 5,
            late: 1,
            ..Counters::default()
        };
        c.rejected.insert("invalid_json", 2);
        c.releases.insert("taps".to_string(), 3);
        m.observe(&c);
        m.observe(&c); // idempotent: deltas only
        let text = m.render();
        for name in [
            "scrim_events_total{outcome=\"accepted\"} 5",
            "scrim_events_total{outcome=\"rejected\"} 2",
            "scrim_events_total{outcome=\"late\"} 1",
            "scrim_rejected_events_total{reason=\"invalid_json\"} 2",
            "scrim_releases_total{stat=\"taps\"} 3",
            "scrim_budget_remaining_rho",
            "scrim_budget_spent_rho",
            "scrim_epoch_windows_remaining",
            "scrim_release_lag_seconds",
        ] {
            assert!(text.contains(name), "missing {name} in\n{text}");
        }
    }
}
