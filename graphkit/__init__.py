"""graphkit"""
