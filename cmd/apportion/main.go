// Command apportion inspects small ONNX networks, runs them on input files
// and explains single predictions with gradient attribution methods.
//
// Usage:
//
//	apportion <command> [flags]
//
// The commands are:
//
//	explain   attribute one output of a model to its input features
//	predict   run a model on input files and print its outputs
//	inspect   describe a model's inputs, outputs, operators and parameters
//	summarize summarise the attributions of many rows, overall and per group
//	serve     answer predict and explain requests over HTTP
//	version   print the version, the Go version and the kernels in use
//	help      show help for a command
//
// Results go to standard output and diagnostics to standard error. The exit
// status is 0 on success, 1 when the work failed and 2 on a usage error.
package main

import (
	"errors"
	"flag"
	"fmt"
	"io"
	"os"
	"strings"
)

func main() {
	os.Exit(run(os.Args[1:], os.Stdin, os.Stdout, os.Stderr))
}

// Exit statuses.
const (
	exitOK    = 0
	exitFail  = 1
	exitUsage = 2
)

// caution is printed by the top-level help and by explain -h.
const caution = `Caution: an attribution describes how this model's output responds to its
inputs. It does not say what causes the outcome in the world, and a model can
be right for the wrong reasons. Where explanations feed decisions about people
(credit, health, hiring and the like), follow the rules that apply where you
are and have the results reviewed by qualified people.`

// command is one subcommand.
type command struct {
	name    string
	summary string
	run     func(args []string, stdin io.Reader, stdout, stderr io.Writer) int
}

func commands() []command {
	return []command{
		{"explain", "attribute one output of a model to its input features", runExplain},
		{"predict", "run a model on input files and print its outputs", runPredict},
		{"inspect", "describe a model's inputs, outputs, operators and parameters", runInspect},
		{"summarize", "summarise the attributions of many rows, overall and per group", runSummarize},
		{"serve", "answer predict and explain requests over HTTP", runServe},
		{"version", "print the version, the Go version and the kernels in use", runVersion},
	}
}

// run is the whole program: main only maps its result to the exit status.
func run(args []string, stdin io.Reader, stdout, stderr io.Writer) int {
	if len(args) == 0 {
		topUsage(stderr)
		return exitUsage
	}
	name := args[0]
	switch name {
	case "help", "-h", "-help", "--help":
		if len(args) > 1 && name == "help" {
			for _, c := range commands() {
				if c.name == args[1] {
					return c.run([]string{"-h"}, stdin, stdout, stderr)
				}
			}
			fmt.Fprintf(stderr, "apportion help: unknown command %q\n", args[1])
			topUsage(stderr)
			return exitUsage
		}
		topUsage(stdout)
		return exitOK
	}
	for _, c := range commands() {
		if c.name == name {
			return c.run(args[1:], stdin, stdout, stderr)
		}
	}
	fmt.Fprintf(stderr, "apportion: unknown command %q\n", name)
	topUsage(stderr)
	return exitUsage
}

func topUsage(w io.Writer) {
	fmt.Fprintln(w, "apportion explains single predictions of small ONNX networks.")
	fmt.Fprintln(w)
	fmt.Fprintln(w, "Usage:")
	fmt.Fprintln(w)
	fmt.Fprintln(w, "\tapportion <command> [flags]")
	fmt.Fprintln(w)
	fmt.Fprintln(w, "The commands are:")
	fmt.Fprintln(w)
	for _, c := range commands() {
		fmt.Fprintf(w, "\t%-9s %s\n", c.name, c.summary)
	}
	fmt.Fprintf(w, "\t%-9s %s\n", "help", "show help for a command")
	fmt.Fprintln(w)
	fmt.Fprintln(w, `Use "apportion <command> -h" for the flags of a command.`)
	fmt.Fprintln(w)
	fmt.Fprintln(w, caution)
}

// newFlagSet returns a flag set whose -h output is a usage line, an optional
// description, the flags and an example.
func newFlagSet(name, usage, example, extra string, stderr io.Writer) *flag.FlagSet {
	fs := flag.NewFlagSet("apportion "+name, flag.ContinueOnError)
	fs.SetOutput(stderr)
	fs.Usage = func() {
		w := fs.Output()
		fmt.Fprintf(w, "Usage: apportion %s %s\n\n", name, usage)
		fmt.Fprintln(w, "Flags:")
		fs.PrintDefaults()
		fmt.Fprintf(w, "\nExample:\n\n\t%s\n", example)
		if extra != "" {
			fmt.Fprintf(w, "\n%s\n", extra)
		}
	}
	return fs
}

// parseFlags parses args; done reports that the caller should return code
// (after -h, or on a flag error).
func parseFlags(fs *flag.FlagSet, args []string, stdout io.Writer) (code int, done bool) {
	// -h goes to stdout with status 0, like "go help <cmd>"; flag errors
	// go to stderr with status 2.
	for _, a := range args {
		if a == "--" {
			break
		}
		if a == "-h" || a == "-help" || a == "--help" || a == "--h" {
			errOut := fs.Output()
			fs.SetOutput(stdout)
			fs.Usage()
			fs.SetOutput(errOut)
			return exitOK, true
		}
	}
	if err := fs.Parse(args); err != nil {
		if errors.Is(err, flag.ErrHelp) {
			return exitOK, true
		}
		return exitUsage, true
	}
	if fs.NArg() > 0 {
		fmt.Fprintf(fs.Output(), "%s: unexpected arguments: %s\n", fs.Name(), strings.Join(fs.Args(), " "))
		return exitUsage, true
	}
	return 0, false
}

// usageError prints msg and a pointer to -h, and returns the usage status.
func usageError(stderr io.Writer, cmd, format string, a ...any) int {
	fmt.Fprintf(stderr, "apportion %s: %s\n", cmd, fmt.Sprintf(format, a...))
	fmt.Fprintf(stderr, "Run 'apportion %s -h' for usage.\n", cmd)
	return exitUsage
}

// failure prints err and returns the failure status.
func failure(stderr io.Writer, cmd string, err error) int {
	fmt.Fprintf(stderr, "apportion %s: %v\n", cmd, err)
	return exitFail
}
