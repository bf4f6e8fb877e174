package main

// version is set at build time (-ldflags "-X main.version=..."); see
// deploy/Dockerfile and the Makefile's image target.
var version = "dev"
