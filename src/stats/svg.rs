//! Plot primitives for the HTML reports.
