"""tomography"""
