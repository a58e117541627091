/* placeholder */
#include "pyclef.h"
PyMethodDef pyclef_spectrum_methods[] = {{NULL, NULL, 0, NULL}};
