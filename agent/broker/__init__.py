"""broker"""
