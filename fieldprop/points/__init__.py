"""points"""
