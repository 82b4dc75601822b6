//go:build !purego

package main

const goldenPortable = false
