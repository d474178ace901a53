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
    epochs_charged: u64,
    last_epoch: Option<u64>,
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
            let after = (self.epochs_charged + 1) as f64 * self.rho_per_epoch;
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

    /// zCDP spent over the lifetime (unit level: epochs × ρ; event level: ρ of one epoch
    /// once any epoch ran, by parallel composition).
    pub fn spent(&self) -> f64 {
        match self.lifetime_rho {
            Some(_) => self.epochs_charged as f64 * self.rho_per_epoch,
            None if self.epochs_charged > 0 => self.rho_per_epoch,
            None => 0.0,
        }
    }

    /// Lifetime zCDP left (None at event level: no cap).
    pub fn remaining(&self) -> Option<f64> {
        self.lifetime_rho.map(|l| (l - self.spent()).max(0.0))
    }

    /// Epochs charged so far.
    pub fn epochs_charged(&self) -> u64 {
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
