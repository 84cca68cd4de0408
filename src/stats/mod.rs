//! Statistics and accounting core (placeholder, being written).
