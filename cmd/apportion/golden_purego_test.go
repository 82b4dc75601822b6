//go:build purego

package main

const goldenPortable = true
