//! The budget ledger: charges each epoch's zCDP before any of its releases exist, and
//! refuses (fails closed) when the lifetime budget cannot cover a new epoch.
//!
//! Composition rules (Bun & Steinke 2016: zCDP composes additively, also adaptively):
//! - **Unit level.** One unit can appear in every epoch, so epochs compose sequentially:
//!   after `n` epochs the total is `n · ρ_epoch`, which must stay ≤ `lifetime_rho`.
//! - **Event level.** Every event belongs to exactly one window, hence one epoch; epochs
//!   see disjoint data and compose in parallel (McSherry 2009, "Privacy integrated
//!   queries", parallel composition — common practice), so the whole stream costs one
//!   `ρ_epoch` and there is no lifetime cap.
//!
//! A [`EpochCharge`] can only be created by [`Ledger::charge_epoch`]; releases are built
//! from it, so no release can exist for an epoch that was not paid for.
//!
//! **Generations.** A deployment may change its configuration only by starting a fresh
//! epoch deliberately (`scrim state new-epoch`): the ledger of the new generation is built
//! with [`Ledger::continued`] from what the earlier generations spent, and charges its own
//! epochs (at the new `rho_per_epoch`) on top. Unit level: the spends add (sequential
//! composition again). Event level: every generation's epochs hold disjoint windows, hence
//! disjoint events, so the total is the largest single epoch charge (parallel composition).

/// Proof that an epoch's budget was charged. Not constructible outside this module.
#[derive(Clone, Debug, PartialEq)]
pub struct EpochCharge {
    epoch: u64,
    rho: f64,
}

impl EpochCharge {
    /// The epoch paid for.
    pub fn epoch(&self) -> u64 {
        self.epoch
    }

    /// zCDP charged for it.
    pub fn rho(&self) -> f64 {
        self.rho
    }
}

/// Why an epoch cannot start.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum BudgetError {
    /// The lifetime budget left is below one epoch's cost.
    #[error(
        "lifetime budget exhausted: epoch {epoch} needs rho {needed} but only {remaining} of privacy.lifetime_rho = {lifetime} remains; nothing more will be released (raise lifetime_rho only after a privacy review, or start a new deployment)"
    )]
    Exhausted {
        /// Epoch that could not start.
        epoch: u64,
        /// Its cost.
        needed: f64,
        /// What is left.
        remaining: f64,
        /// The configured cap.
        lifetime: f64,
    },
    /// Epochs must be charged in increasing order, once each.
    #[error("epoch {epoch} was already charged or is out of order (last charged: {last:?})")]
    OutOfOrder {
        /// Requested epoch.
        epoch: u64,
        /// Last charged epoch.
        last: Option<u64>,
    },
}

/// The zCDP ledger.
#[derive(Clone, Debug, PartialEq)]
pub struct Ledger {
    rho_per_epoch: f64,
    lifetime_rho: Option<f64>,
    /// Epochs charged by this ledger (this generation), each at `rho_per_epoch`.
    epochs_charged: u64,
    last_epoch: Option<u64>,
    /// zCDP spent by earlier generations (see [`Ledger::continued`]).
    spent_before: f64,
    /// Epochs charged by earlier generations.
    epochs_before: u64,
}

impl Ledger {
    /// A ledger charging `rho_per_epoch` per epoch against `lifetime_rho` (None: event level,
    /// parallel composition, no cap).
    pub fn new(rho_per_epoch: f64, lifetime_rho: Option<f64>) -> Ledger {
        Ledger {
            rho_per_epoch,
            lifetime_rho,
            epochs_charged: 0,
            last_epoch: None,
            spent_before: 0.0,
            epochs_before: 0,
        }
    }

    /// A ledger for a new generation of a deployment: earlier generations spent
    /// `spent_before` zCDP over `epochs_before` epochs, and every epoch index below
    /// `first_epoch` belongs to them (so it can never be charged, or noised, again).
    ///
    /// The lifetime check of [`Ledger::charge_epoch`] becomes
    /// `spent_before + (n + 1)·ρ ≤ lifetime_rho` for this generation's `n`-th epoch:
    /// zCDP composes additively (Bun & Steinke 2016, Lemma 2.3), whatever ρ each epoch had.
    pub fn continued(
        rho_per_epoch: f64,
        lifetime_rho: Option<f64>,
        spent_before: f64,
        epochs_before: u64,
        first_epoch: u64,
    ) -> Ledger {
        Ledger {
            rho_per_epoch,
            lifetime_rho,
            epochs_charged: 0,
            last_epoch: first_epoch.checked_sub(1),
            spent_before,
            epochs_before,
        }
    }

    /// Restores a ledger from saved counters.
    pub fn restore(
        rho_per_epoch: f64,
        lifetime_rho: Option<f64>,
        epochs_charged: u64,
        last_epoch: Option<u64>,
    ) -> Ledger {
        Ledger {
            rho_per_epoch,
            lifetime_rho,
            epochs_charged,
            last_epoch,
            spent_before: 0.0,
            epochs_before: 0,
        }
    }

    /// Charges `epoch`. Fails closed when the lifetime cap cannot cover it.
    pub fn charge_epoch(&mut self, epoch: u64) -> Result<EpochCharge, BudgetError> {
        if let Some(last) = self.last_epoch
            && epoch <= last
        {
            return Err(BudgetError::OutOfOrder {
                epoch,
                last: self.last_epoch,
            });
        }
        if let Some(lifetime) = self.lifetime_rho {
            let after = self.spent_before + (self.epochs_charged + 1) as f64 * self.rho_per_epoch;
            // Relative slack 1e-12 so that e.g. 8 × 0.5 ≤ 4.0 is not refused by binary rounding.
            if after > lifetime * (1.0 + 1e-12) {
                return Err(BudgetError::Exhausted {
                    epoch,
                    needed: self.rho_per_epoch,
                    remaining: self.remaining().unwrap_or(0.0),
                    lifetime,
                });
            }
        }
        self.epochs_charged += 1;
        self.last_epoch = Some(epoch);
        Ok(EpochCharge {
            epoch,
            rho: self.rho_per_epoch,
        })
    }

    /// zCDP spent over the lifetime, earlier generations included (unit level: their spend
    /// plus epochs × ρ; event level: the largest one-epoch charge, by parallel composition).
    pub fn spent(&self) -> f64 {
        match self.lifetime_rho {
            Some(_) => self.spent_before + self.epochs_charged as f64 * self.rho_per_epoch,
            None if self.epochs_charged > 0 => self.spent_before.max(self.rho_per_epoch),
            None => self.spent_before,
        }
    }

    /// How many more epochs the lifetime budget can pay for (None at event level: no cap).
    /// Uses exactly the test of [`Ledger::charge_epoch`].
    pub fn epochs_affordable(&self) -> Option<u64> {
        let lifetime = self.lifetime_rho?;
        let fits = |k: u64| {
            self.spent_before + self.epochs_charged.saturating_add(k) as f64 * self.rho_per_epoch
                <= lifetime * (1.0 + 1e-12)
        };
        let left = (lifetime - self.spent()).max(0.0) / self.rho_per_epoch;
        // `left` is within rounding of the answer; settle it with the exact test.
        let mut k = (left.floor() as u64).saturating_sub(1);
        while k < u64::MAX && fits(k + 1) {
            k += 1;
        }
        while k > 0 && !fits(k) {
            k -= 1;
        }
        Some(k)
    }

    /// Lifetime zCDP left (None at event level: no cap).
    pub fn remaining(&self) -> Option<f64> {
        self.lifetime_rho.map(|l| (l - self.spent()).max(0.0))
    }

    /// Epochs charged so far, earlier generations included.
    pub fn epochs_charged(&self) -> u64 {
        self.epochs_before + self.epochs_charged
    }

    /// Epochs charged by this generation (at this ledger's `rho_per_epoch`).
    pub fn epochs_charged_here(&self) -> u64 {
        self.epochs_charged
    }

    /// Last charged epoch.
    pub fn last_epoch(&self) -> Option<u64> {
        self.last_epoch
    }

    /// Configured lifetime cap.
    pub fn lifetime_rho(&self) -> Option<f64> {
        self.lifetime_rho
    }

    /// Configured per-epoch charge.
    pub fn rho_per_epoch(&self) -> f64 {
        self.rho_per_epoch
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sequential_composition_caps_the_number_of_epochs() {
        // 4.0 / 0.5 = 8 epochs exactly (additive composition, Bun & Steinke 2016).
        let mut l = Ledger::new(0.5, Some(4.0));
        for e in 0..8 {
            assert_eq!(l.charge_epoch(e).unwrap().epoch(), e);
        }
        assert_eq!(l.spent(), 4.0);
        assert_eq!(l.remaining(), Some(0.0));
        let err = l.charge_epoch(8).unwrap_err();
        assert!(matches!(err, BudgetError::Exhausted { epoch: 8, .. }));
        assert!(err.to_string().contains("lifetime_rho"));
        assert_eq!(l.epochs_charged(), 8, "a refused charge spends nothing");
    }

    #[test]
    fn event_level_composes_in_parallel() {
        let mut l = Ledger::new(0.5, None);
        for e in 0..100 {
            l.charge_epoch(e).unwrap();
        }
        assert_eq!(l.spent(), 0.5);
        assert_eq!(l.remaining(), None);
    }

    #[test]
    fn a_continued_ledger_adds_earlier_spend_and_never_reuses_an_epoch() {
        // Earlier generation: 3 epochs at 0.5 (1.5 of 4.0). New generation at 1.0 per epoch:
        // 1.5 + 2 × 1.0 = 3.5 ≤ 4.0 but 1.5 + 3 × 1.0 = 4.5 > 4.0, so exactly 2 more epochs
        // (additive composition, Bun & Steinke 2016).
        let mut l = Ledger::continued(1.0, Some(4.0), 1.5, 3, 7);
        assert_eq!(l.spent(), 1.5);
        assert_eq!(l.epochs_charged(), 3);
        assert_eq!(l.epochs_affordable(), Some(2));
        assert!(matches!(
            l.charge_epoch(6),
            Err(BudgetError::OutOfOrder { .. })
        ));
        assert_eq!(l.charge_epoch(7).unwrap().rho(), 1.0);
        assert_eq!(l.charge_epoch(8).unwrap().epoch(), 8);
        assert_eq!(l.spent(), 3.5);
        assert_eq!(l.epochs_charged(), 5);
        assert_eq!(l.epochs_charged_here(), 2);
        assert_eq!(l.epochs_affordable(), Some(0));
        assert!(matches!(
            l.charge_epoch(9),
            Err(BudgetError::Exhausted { epoch: 9, .. })
        ));
        // Event level: generations hold disjoint windows, so the total is the largest
        // single charge (parallel composition, McSherry 2009).
        let mut e = Ledger::continued(0.25, None, 0.5, 10, 10);
        assert_eq!(e.spent(), 0.5);
        e.charge_epoch(10).unwrap();
        assert_eq!(e.spent(), 0.5);
        let mut e = Ledger::continued(2.0, None, 0.5, 10, 10);
        e.charge_epoch(10).unwrap();
        assert_eq!(e.spent(), 2.0);
        assert_eq!(e.epochs_affordable(), None);
    }

    #[test]
    fn affordable_epochs_match_repeated_charges() {
        // Brute force: count the charges that succeed, for awkward binary fractions.
        for (rho, life, before) in [
            (0.1, 1.0, 0.3),
            (0.5, 4.0, 0.0),
            (0.3, 0.9, 0.0),
            (0.7, 3.0, 0.2),
        ] {
            let mut l = Ledger::continued(rho, Some(life), before, 1, 1);
            let predicted = l.epochs_affordable().unwrap();
            let mut n = 0;
            while l.charge_epoch(1 + n).is_ok() {
                n += 1;
            }
            assert_eq!(predicted, n, "rho {rho} lifetime {life} before {before}");
        }
    }

    #[test]
    fn epochs_cannot_be_charged_twice() {
        let mut l = Ledger::new(0.5, Some(4.0));
        l.charge_epoch(3).unwrap();
        assert!(matches!(
            l.charge_epoch(3),
            Err(BudgetError::OutOfOrder { .. })
        ));
        assert!(matches!(
            l.charge_epoch(1),
            Err(BudgetError::OutOfOrder { .. })
        ));
    }
}
