//! The runtime shell: the only place that touches the OS clock and the OS random number
//! generator. Everything it reads is handed to the pure engine as plain values.

use crate::engine::noise::NoiseKey;
use crate::engine::time::Millis;

/// A fresh 32-byte noise key from the operating system's CSPRNG (getrandom).
pub fn os_noise_key() -> std::io::Result<NoiseKey> {
    use rand::TryRng;
    let mut bytes = [0u8; 32];
    rand::rngs::SysRng.try_fill_bytes(&mut bytes).map_err(|e| {
        std::io::Error::other(format!("the OS random number generator failed: {e}"))
    })?;
    Ok(NoiseKey::from_bytes(bytes))
}

/// The wall clock as engine time.
pub fn now() -> Millis {
    let d = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .unwrap_or_default();
    Millis(i64::try_from(d.as_millis()).unwrap_or(i64::MAX))
}

pub mod daemon;
pub mod http;
pub mod metrics;
pub mod parse_pool;
pub mod sources;
pub mod state;
