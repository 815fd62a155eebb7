//! CAP 1.2 alerts (placeholder, filled in next).
