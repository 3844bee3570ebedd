"""collect"""
