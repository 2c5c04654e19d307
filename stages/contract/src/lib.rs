//! The stage contract: everything a spikeyard stage needs to read its input
//! and write its output, and nothing about how any stage computes.
//!
//! Map of modules, in data-flow order:
//! - [`recording`]: the recording description (TOML + raw binary + electrode
//!   table, fixed by the project's interface contract), validated once, then
//!   read in chunks with margins through short-lived memory maps.
//! - [`request`]: the JSON request the orchestrator hands a stage
//!   (parameters, input artifacts, output folder), and the progress lines a
//!   stage prints on stderr.
//! - [`table`]: Parquet writers that write under a temporary name and rename
//!   only after the footer is written.
//! - [`events`]: the events table read as a stream, and a walk over the
//!   recording that hands each chunk's events to a callback.
//! - [`noise`]: the MAD noise estimate shared by the QC and detect stages.
//! - [`hash`]: content hashes for cache keys and manifests.
//! - [`sampling`]: seeded subsets independent of visiting order.
//! - [`runs`]: several buffers cut into the same runs for parallel tasks.
//! - [`mod@stage_main`]: the command-line glue every Rust stage shares.
//!
//! Conventions, stated once: samples are 0-based frame indices into the
//! recording; voltages are microvolts (µV) as `f32`; signed amplitudes keep
//! their sign (a negative trough stays negative); positions are micrometres.

pub mod error;
pub mod events;
pub mod hash;
pub mod linalg;
pub mod noise;
pub mod packed;
pub mod recording;
pub mod request;
pub mod runs;
pub mod sampling;
pub mod stage_main;
pub mod table;
pub mod testing;

pub use error::{ContractError, RecordingError};
pub use recording::{Chunk, Dtype, Electrode, Layout, Recording};
pub use request::{ProgressReporter, StageReport, StageRequest};
pub use stage_main::{stage_main, StageFailure};

/// The body of a method that calls `$this.$method(args)`, an
/// `#[inline(always)]` method of `$ty`, in a copy built for AVX-512 or
/// AVX2 (each with FMA) when the CPU has them (chosen at run time; the
/// build itself targets any x86-64), else as built. The operations and
/// their order are the same in every copy, and a multiply-add is fused
/// only where the code says so (`mul_add`: one rounding in every copy, an
/// instruction in the wide ones, the library's exact routine otherwise),
/// so the results are identical; the tests compare the copies.
#[macro_export]
macro_rules! wide_build {
    ($ty:ty, $this:ident.$method:ident($($arg:ident: $arg_ty:ty),*) -> $ret:ty) => {{
        #[cfg(target_arch = "x86_64")]
        {
            #[target_feature(enable = "avx512f,fma")]
            unsafe fn avx512(this: &$ty, $($arg: $arg_ty),*) -> $ret {
                this.$method($($arg),*)
            }
            #[target_feature(enable = "avx2,fma")]
            unsafe fn avx2(this: &$ty, $($arg: $arg_ty),*) -> $ret {
                this.$method($($arg),*)
            }
            let fma = std::is_x86_feature_detected!("fma");
            if fma && std::is_x86_feature_detected!("avx512f") {
                // SAFETY: the CPU supports AVX-512F and FMA, checked just above.
                return unsafe { avx512($this, $($arg),*) };
            }
            if fma && std::is_x86_feature_detected!("avx2") {
                // SAFETY: the CPU supports AVX2 and FMA, checked just above.
                return unsafe { avx2($this, $($arg),*) };
            }
        }
        $this.$method($($arg),*)
    }};
}
