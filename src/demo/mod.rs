//! The bundled demo scenario: an invented pump-fleet condition-monitoring data set and its models.
