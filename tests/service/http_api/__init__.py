"""Tests of the HTTP scoring service (a package named so it cannot shadow the real ``service``)."""
