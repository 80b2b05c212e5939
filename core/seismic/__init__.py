"""seismic"""
