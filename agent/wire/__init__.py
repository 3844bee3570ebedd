"""wire"""
