"""surface"""
