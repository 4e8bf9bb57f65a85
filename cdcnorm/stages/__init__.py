"""Plan-building stages, in pipeline order: source, type, order, dedupe, pair, envelope."""
