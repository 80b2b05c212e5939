"""Seismic processing of the picks: forward models, gather fits, geometry of reflector points, dips, misties."""
