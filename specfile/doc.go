// Package specfile reads a spec file: a YAML document that declares the
// event schema (field names and types, which field is the time and how it
// is written), the pipeline's run settings, and the entities and features
// to compute, with filters on event fields. It produces a
// tallyward.Spec[Event] and tallyward.Options, so a spec file and the
// equivalent Go code compute identical features: the file is a second way
// to write the same definitions, not a second engine.
//
// Every key is documented in REFERENCE.md beside this file; kind names and
// parameters map one to one onto the Go API's kinds, and defaults are the
// Go API's.
//
// Errors: Parse reports every problem at once in an *Error, each with the
// line and the key it concerns ("spec.yaml:14: entities[0].features[2].window:
// ..."). Row decoding (JSONDecoder, Schema.SetText, Schema.TimeText)
// reports a *FieldError naming the field; callers add the file and line.
//
// Event is the dynamic event type the pipelines of a spec file run on: a
// time and one Value per declared field. Filters are equality, set
// membership and numeric comparison on single fields, all of which must
// hold; there is deliberately no expression language.
//
// Not for: computing anything; package tallyward does that. Not a general
// configuration format: unknown keys are errors, so typos are caught.
//
// A parsed File and its Schema are immutable and safe for concurrent use;
// a JSONDecoder is not.
package specfile
