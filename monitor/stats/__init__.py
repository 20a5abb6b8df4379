"""Pure numerical statistics: numpy and scipy only, no files, SQL, time zones or HTML.

Everything here can be checked against published values alone and shipped to a worker process.
"""
