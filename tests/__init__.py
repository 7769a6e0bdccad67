# Makes ``tests`` a regular package so ``tests.support`` imports the same way
# under every pytest import mode (and is never shadowed by a stray ``tests``
# package in site-packages).
