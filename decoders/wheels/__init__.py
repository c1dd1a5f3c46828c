"""wheels"""
