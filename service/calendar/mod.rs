//! Calendar and clock rules for watches and digests: pure functions of
//! instants, IANA zones and dates.
//!
//! Owns the watch time windows ([`Hours`]: any, local `HH:MM-HH:MM`,
//! dusk-to-dawn) and seasons ([`Season`]: `MM-DD..MM-DD`), and local-time
//! resolution for schedules ([`resolve_local`], [`next_occurrence`]), daily
//! buckets ([`local_day_bounds`]) and [`local_date_of`].
//!
//! Conventions (METHODS.md section 6, explained in
//! `docs/geography-and-time.md`): instants are UTC; a window test uses the
//! instant's own local time; a schedule time in a spring-forward gap resolves
//! to the first instant after the jump, one in an autumn fold to its first
//! occurrence; daily buckets are [local midnight, next local midnight).
//!
//! Pure: no clock reads (the instant is passed in), no I/O. Dusk-to-dawn uses
//! [`crate::geo::solar`] through the sibling `geo` module.
//!
//! # Layout
//! - [`window`]: [`Hours`], [`LocalHours`], [`Season`], [`WindowError`].
//! - [`local`]: local-time resolution, day buckets, next occurrence.
//! - [`text`]: instants written as text without chrono's formatter.

pub mod local;
pub mod text;
pub mod window;

pub use local::{local_date_of, local_day_bounds, next_occurrence, resolve_local};
pub use window::{Hours, LocalHours, Season, WindowError};
