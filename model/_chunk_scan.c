/* One pass over cleaned text: its distinct whitespace-separated chunks, sorted into plain
 * words and the rest.  The compiled form of the first steps of words.split_words, which
 * words.python_scan also spells out in Python (the fallback, and the specification the
 * tests hold this to).
 *
 * In Python the steps are str.split, dict.fromkeys and a loop over the distinct chunks: a
 * str object and a SipHash for every chunk, then an interpreted test of each distinct one.
 * Here a chunk is a slice of the text until it proves new: the slices are told apart by a
 * cheap hash and memcmp, and only the distinct ones become str objects.
 *
 * Whitespace and letters are CPython's own (Py_UNICODE_ISSPACE, Py_UNICODE_ISALPHA), the
 * tests str.split() and str.isalpha() make, so the chunks and their classes are the same
 * for every str.
 *
 * ascii_words does the same for the word sequence a bigram model pairs up
 * (words.python_ascii_words): the matches of words._WORD_ASCII in ASCII text, where the
 * regular expression engine spent about 190 instructions a character.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <stdint.h>
#include <string.h>

typedef struct {
    Py_ssize_t start; /* -1: empty */
    Py_ssize_t length;
    uint64_t hash;
    PyObject *word; /* ascii_words: the str made for this slice (the list holds it) */
} Slot;

typedef struct {
    Slot *slots;
    size_t mask;
    size_t used;
} Seen;

static int seen_init(Seen *seen, size_t capacity) {
    seen->slots = PyMem_Malloc(capacity * sizeof(Slot));
    if (seen->slots == NULL) {
        PyErr_NoMemory();
        return -1;
    }
    for (size_t i = 0; i < capacity; i++) seen->slots[i].start = -1;
    seen->mask = capacity - 1;
    seen->used = 0;
    return 0;
}

static int seen_grow(Seen *seen) {
    Seen bigger;
    if (seen_init(&bigger, 2 * (seen->mask + 1)) < 0) return -1;
    for (size_t i = 0; i <= seen->mask; i++) {
        Slot slot = seen->slots[i];
        if (slot.start < 0) continue;
        size_t at = (size_t)slot.hash & bigger.mask;
        while (bigger.slots[at].start >= 0) at = (at + 1) & bigger.mask;
        bigger.slots[at] = slot;
    }
    bigger.used = seen->used;
    PyMem_Free(seen->slots);
    *seen = bigger;
    return 0;
}

/* A chunk's first and last eight bytes (fewer when it is shorter) and its size, mixed by
 * multiplication: only a table index, never stored or shown.  Most chunks are words shorter
 * than sixteen bytes, which this reads whole; longer ones that agree at both ends and in
 * size only cost a memcmp more. */
static uint64_t slice_hash(const char *bytes, Py_ssize_t size) {
    uint64_t head = 0, tail = 0;
    if (size >= 8) {
        memcpy(&head, bytes, 8);
        memcpy(&tail, bytes + size - 8, 8);
    } else {
        memcpy(&head, bytes, (size_t)size);
    }
    uint64_t hash = (head ^ ((uint64_t)size << 56)) * 0x9E3779B97F4A7C15ULL;
    hash = (hash ^ (hash >> 31) ^ tail) * 0xBF58476D1CE4E5B9ULL;
    return hash ^ (hash >> 29);
}

/* 1: the slice is new (and now recorded); 0: seen before; -1: out of memory.  *slot_out
 * (when not NULL) is its slot, valid until the next call. */
static int seen_add(Seen *seen, const char *data, int kind, Py_ssize_t start, Py_ssize_t length,
                    Slot **slot_out) {
    /* Grown before the slice goes in, so the slot handed back stays where it is. */
    if (2 * (seen->used + 1) > seen->mask + 1 && seen_grow(seen) < 0) return -1;
    const char *bytes = data + start * kind;
    Py_ssize_t size = length * kind;
    uint64_t hash = slice_hash(bytes, size);
    size_t at = (size_t)hash & seen->mask;
    Slot *slot;
    for (;;) {
        slot = &seen->slots[at];
        if (slot->start < 0) break;
        if (slot->hash == hash && slot->length == length &&
            memcmp(data + slot->start * kind, bytes, size) == 0) {
            if (slot_out != NULL) *slot_out = slot;
            return 0;
        }
        at = (at + 1) & seen->mask;
    }
    *slot = (Slot){start, length, hash, NULL};
    seen->used++;
    if (slot_out != NULL) *slot_out = slot;
    return 1;
}

/* For text of one byte a character (ASCII and Latin-1, nearly all mail): CPython's answers
 * for each of the 256 characters, filled in when the module loads. */
static unsigned char space1[256], alpha1[256];

static int all_letters(const void *data, int kind, Py_ssize_t start, Py_ssize_t end) {
    for (Py_ssize_t i = start; i < end; i++)
        if (!Py_UNICODE_ISALPHA(PyUnicode_READ(kind, data, i))) return 0;
    return 1;
}

/* The next chunk at or after *at: its start, its end in *at, and in *letters whether it is
 * all letters (-1: not looked at).  Returns -1 when the text holds no more chunks. */
static Py_ssize_t next_chunk(const void *data, int kind, Py_ssize_t length, Py_ssize_t *at,
                             int *letters) {
    Py_ssize_t i = *at, start;
    if (kind == PyUnicode_1BYTE_KIND) {
        const Py_UCS1 *chars = data;
        unsigned char all = 1;
        while (i < length && space1[chars[i]]) i++;
        start = i;
        for (; i < length && !space1[chars[i]]; i++) all &= alpha1[chars[i]];
        *letters = all;
    } else {
        while (i < length && Py_UNICODE_ISSPACE(PyUnicode_READ(kind, data, i))) i++;
        start = i;
        while (i < length && !Py_UNICODE_ISSPACE(PyUnicode_READ(kind, data, i))) i++;
        *letters = -1;
    }
    *at = i;
    return i == start ? -1 : start;
}

/* Record one new chunk: a plain word (all letters, at least min_word) in `plain`, any other
 * chunk of two or more characters in `others`, a single character in `singles` (and in
 * `others` too when it is not a letter). */
static int take_chunk(PyObject *text, const void *data, int kind, Py_ssize_t start,
                      Py_ssize_t end, int letters, Py_ssize_t min_word, Py_ssize_t max_word,
                      PyObject *plain, PyObject *others, PyObject *singles, int *too_long) {
    Py_ssize_t length = end - start;
    if (letters < 0) letters = all_letters(data, kind, start, end);
    if (letters && length > 1 && length < min_word) return 0;
    PyObject *chunk = PyUnicode_Substring(text, start, end);
    if (chunk == NULL) return -1;
    int failed = 0;
    if (length == 1) failed = PyList_Append(singles, chunk);
    if (!failed && !letters) failed = PyList_Append(others, chunk);
    if (!failed && letters && length >= min_word) {
        failed = PyDict_SetItem(plain, chunk, Py_None);
        if (length > max_word) *too_long = 1;
    }
    Py_DECREF(chunk);
    return failed ? -1 : 0;
}

/* The arguments (text: str, min_word: int, max_word: int) both functions take; 0, or -1
 * with an exception set (`signature` names the call in the TypeError). */
static int text_arguments(PyObject *const *args, Py_ssize_t nargs, const char *signature,
                          PyObject **text, Py_ssize_t *min_word, Py_ssize_t *max_word) {
    if (nargs != 3 || !PyUnicode_Check(args[0])) {
        PyErr_SetString(PyExc_TypeError, signature);
        return -1;
    }
    *text = args[0];
    *min_word = PyLong_AsSsize_t(args[1]);
    *max_word = PyLong_AsSsize_t(args[2]);
    if ((*min_word == -1 || *max_word == -1) && PyErr_Occurred()) return -1;
#if PY_VERSION_HEX < 0x030C0000
    if (PyUnicode_READY(*text) < 0) return -1; /* a no-op from 3.12 */
#endif
    return 0;
}

PyDoc_STRVAR(scan_doc,
"scan(text, min_word, max_word) -> (plain, others, singles, too_long)\n\n"
"The distinct chunks of text.split(), in order of first appearance: plain words (all\n"
"letters, at least min_word long) as a dict to None, the chunks not all letters as a list,\n"
"the chunks one character long as a list, and whether a plain word is longer than max_word.");

static PyObject *scan(PyObject *Py_UNUSED(module), PyObject *const *args, Py_ssize_t nargs) {
    PyObject *text;
    Py_ssize_t min_word, max_word;
    if (text_arguments(args, nargs, "scan(text: str, min_word: int, max_word: int)", &text,
                       &min_word, &max_word) < 0)
        return NULL;
    int kind = PyUnicode_KIND(text);
    const void *data = PyUnicode_DATA(text);
    Py_ssize_t length = PyUnicode_GET_LENGTH(text);

    PyObject *plain = PyDict_New();
    PyObject *others = PyList_New(0);
    PyObject *singles = PyList_New(0);
    Seen seen = {NULL, 0, 0};
    int too_long = 0;
    if (plain == NULL || others == NULL || singles == NULL || seen_init(&seen, 512) < 0)
        goto fail;
    Py_ssize_t at = 0, start;
    int letters;
    while ((start = next_chunk(data, kind, length, &at, &letters)) >= 0) {
        int added = seen_add(&seen, data, kind, start, at - start, NULL);
        if (added < 0) goto fail;
        if (added && take_chunk(text, data, kind, start, at, letters, min_word, max_word, plain,
                                others, singles, &too_long) < 0)
            goto fail;
    }
    PyMem_Free(seen.slots);
    return Py_BuildValue("(NNNO)", plain, others, singles, too_long ? Py_True : Py_False);

fail:
    PyMem_Free(seen.slots);
    Py_XDECREF(plain);
    Py_XDECREF(others);
    Py_XDECREF(singles);
    return NULL;
}

/* [A-Za-z]: the letters of words._WORD_ASCII. */
static int ascii_letter(Py_UCS1 ch) { return (unsigned)((ch | 0x20) - 'a') < 26; }

PyDoc_STRVAR(ascii_words_doc,
"ascii_words(text, min_word, max_word) -> list of str, or None\n\n"
"The words of ASCII text in order, repeats kept: the matches of [A-Za-z]+(?:'[A-Za-z]+)?\n"
"from min_word to max_word characters long (a repeat is the same str object).  None when\n"
"text is not ASCII.");

static PyObject *ascii_words(PyObject *Py_UNUSED(module), PyObject *const *args,
                             Py_ssize_t nargs) {
    PyObject *text;
    Py_ssize_t min_word, max_word;
    if (text_arguments(args, nargs, "ascii_words(text: str, min_word: int, max_word: int)",
                       &text, &min_word, &max_word) < 0)
        return NULL;
    if (!PyUnicode_IS_ASCII(text)) Py_RETURN_NONE;
    const Py_UCS1 *chars = PyUnicode_1BYTE_DATA(text);
    Py_ssize_t length = PyUnicode_GET_LENGTH(text);
    PyObject *words = PyList_New(0);
    Seen seen = {NULL, 0, 0};
    if (words == NULL || seen_init(&seen, 512) < 0) goto fail;
    Py_ssize_t i = 0;
    while (i < length) {
        if (!ascii_letter(chars[i])) {
            i++;
            continue;
        }
        Py_ssize_t start = i;
        while (i < length && ascii_letter(chars[i])) i++;
        /* The optional group: an apostrophe and at least one letter, or nothing. */
        if (i + 1 < length && chars[i] == '\'' && ascii_letter(chars[i + 1])) {
            i += 2;
            while (i < length && ascii_letter(chars[i])) i++;
        }
        Py_ssize_t size = i - start;
        if (size < min_word || size > max_word) continue;
        Slot *slot;
        int added = seen_add(&seen, (const char *)chars, 1, start, size, &slot);
        if (added < 0) goto fail;
        if (added) {
            slot->word = PyUnicode_Substring(text, start, i);
            if (slot->word == NULL) goto fail;
            int failed = PyList_Append(words, slot->word);
            Py_DECREF(slot->word); /* the list holds it from here */
            if (failed) goto fail;
        } else if (PyList_Append(words, slot->word) < 0) {
            goto fail;
        }
    }
    PyMem_Free(seen.slots);
    return words;

fail:
    PyMem_Free(seen.slots);
    Py_XDECREF(words);
    return NULL;
}

static PyMethodDef methods[] = {
    {"scan", (PyCFunction)(void (*)(void))scan, METH_FASTCALL, scan_doc},
    {"ascii_words", (PyCFunction)(void (*)(void))ascii_words, METH_FASTCALL, ascii_words_doc},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "_chunk_scan",
    "The distinct chunks of cleaned text, and its words in order, each found in one pass (see\n"
    "words.py).", -1, methods,
    NULL, NULL, NULL, NULL,
};

PyMODINIT_FUNC PyInit__chunk_scan(void) {
    for (Py_UCS4 ch = 0; ch < 256; ch++) {
        space1[ch] = Py_UNICODE_ISSPACE(ch) ? 1 : 0;
        alpha1[ch] = Py_UNICODE_ISALPHA(ch) ? 1 : 0;
    }
    return PyModule_Create(&module);
}
