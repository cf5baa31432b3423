//! The caution that travels with every output of framewise.

/// framewise's caution, shown with every session, result, file, report and plot.
pub const CAUTION: &str = "Decision support only, not a diagnosis: framewise outputs are probabilities that can be wrong and must be confirmed by a qualified clinician; check local regulations before any clinical use.";

/// A short form for narrow places (plot footers, progress lines).
pub const CAUTION_SHORT: &str =
    "Decision support only; not a diagnosis. Confirm with a qualified clinician.";
