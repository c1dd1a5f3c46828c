"""frontends"""
