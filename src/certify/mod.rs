//! The certification pipeline: per-sample verdicts, the requirement's verdict, the report.
