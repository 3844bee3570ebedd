"""events"""
