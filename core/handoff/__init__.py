"""Hand-off products: sections along alignments, design-level probabilities and rock volumes."""
